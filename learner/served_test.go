package learner

import (
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"
)

// servedRun is a stream with questions and late labels: at each step either
// a fresh event or the label of a question asked earlier arrives; after
// each step a question may be asked (an answer served). Labels come after a
// random lag of 0 to 180 steps (a minute of event time each); some are
// label-only messages, some name no answer, some come twice.
type servedStep struct {
	ev  *Event
	ask *question // asked after this step's event
}

type question struct {
	id     string
	key    string
	row    int
	x      float64
	y      float64 // its label, when it comes
	labels int     // times its label is sent
	only   bool    // label-only
}

const servedStepNs = int64(time.Minute)

func servedStream(n int, seed uint64) []servedStep {
	r := rand.New(rand.NewPCG(seed, 7))
	keys := []string{"room-a", "room-b", "room-c"}
	due := map[int][]*question{}
	var out []servedStep
	t0 := time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC).UnixNano()
	truth := func(k string, x float64, i int) float64 {
		shift := 0.0
		if i > n/2 {
			shift = 6 // a step shift halfway
		}
		return 2*x + float64(len(k)) + shift + r.NormFloat64()
	}
	for i := 0; len(out) < n; i++ {
		tm := t0 + int64(len(out))*servedStepNs
		var e *Event
		if qs := due[i]; len(qs) > 0 {
			q := qs[0]
			due[i] = qs[1:]
			if len(due[i]) > 0 {
				due[i+1] = append(due[i+1], due[i]...)
			}
			if q.only {
				e = &Event{Key: q.key, Target: q.y, AnswerID: q.id, LabelOnly: true}
			} else {
				e = &Event{Key: q.key, Time: tm, HasTime: true, Target: q.y, AnswerID: q.id, Features: []Feature{{Name: "x", Num: q.x}}}
			}
		} else {
			k := keys[r.IntN(len(keys))]
			x := r.Float64() * 10
			e = &Event{Key: k, Time: tm, HasTime: true, Target: truth(k, x, len(out)), Features: []Feature{{Name: "x", Num: x}}}
			if r.IntN(50) == 0 {
				e.AnswerID = "nobody-asked" // a label naming no answer
			}
		}
		st := servedStep{ev: e}
		if len(out) > 20 && r.IntN(3) == 0 {
			k := keys[r.IntN(len(keys))]
			x := r.Float64() * 10
			q := &question{id: fmt.Sprintf("q%d", len(out)), key: k, row: r.IntN(3), x: x, y: truth(k, x, len(out)), labels: 1, only: r.IntN(5) == 0}
			if r.IntN(40) == 0 {
				q.labels = 2 // sent twice: the second matches nothing
			}
			if r.IntN(30) == 0 {
				q.labels = 0 // never labelled: still waiting at the end
			}
			for j := 0; j < q.labels; j++ {
				at := i + 1 + r.IntN(180)
				due[at] = append(due[at], q)
			}
			st.ask = q
		}
		out = append(out, st)
	}
	return out
}

// servedEngine is the engine of the served tests: two learners and the
// per-key leader (row 2).
func servedEngine(t testing.TB) *Engine {
	return mustEngine(t, Config{Leader: LeaderConfig{On: true}}, "mean:window=50", "rls:forget=0.99")
}

// ask serves q from e as the service does: predict, prepare, register.
func ask(t testing.TB, e *Engine, q *question, log string, seq int64) (Answer, bool) {
	name := LeaderName
	if q.row < 2 {
		name = e.cfg.Learners[q.row].Name
	}
	p, err := e.Predict(q.key, name, &Event{Key: q.key, Features: []Feature{{Name: "x", Num: q.x}}})
	if err != nil {
		return Answer{}, false // not ready or unknown key: nothing served
	}
	a := Answer{ID: q.id, Key: q.key, Learner: q.row, Value: p.Value, Log: log, Seq: seq}
	if p.Conformal != nil {
		a.Low, a.High, a.HasInterval = p.Value-*p.Conformal, p.Value+*p.Conformal, true
	}
	if err := e.PrepareAnswer(&a); err != nil {
		t.Fatal(err)
	}
	if err := e.Serve(a); err != nil {
		t.Fatal(err)
	}
	return a, true
}

// TestServedScoresEqualAHandBuiltReference: with labels delayed by a random
// lag, the served scores equal a reference written out here that records
// each answer served and scores it when its label arrives: error = label −
// the value served; the interval's coverage and width; the delay on the
// stream clock (latest event time when labelled − when served). Duplicate
// labels, labels naming nothing, and answers never labelled are counted as
// the reference counts them.
func TestServedScoresEqualAHandBuiltReference(t *testing.T) {
	steps := servedStream(6000, 1)
	e := servedEngine(t)
	type rec struct {
		a       Answer
		at      int64
		pending bool
	}
	ttl := int64(DefaultServedTTL)
	ref := map[string]*rec{}
	var sumSq, sumAbs, sumErr [3]float64
	var n, answers, intervals, covered, delayN [3]int64
	var width, delaySum [3]float64
	var unmatched, labelOnly int64
	clock := int64(0)
	for i, st := range steps {
		ev := st.ev
		if ev.HasTime && !ev.LabelOnly {
			clock = max(clock, ev.Time)
		}
		if _, err := e.Apply(Position{0, int64(i + 1)}, ev); err != nil {
			t.Fatal(err)
		}
		if ev.LabelOnly {
			labelOnly++
		}
		if id := ev.AnswerID; id != "" {
			r := ref[id]
			if r == nil || !r.pending {
				unmatched++
			} else {
				r.pending = false
				row := r.a.Learner
				d := ev.Target - r.a.Value
				sumSq[row] += d * d
				sumAbs[row] += math.Abs(d)
				sumErr[row] += d
				n[row]++
				if r.a.HasInterval {
					intervals[row]++
					width[row] += r.a.High - r.a.Low
					if ev.Target >= r.a.Low && ev.Target <= r.a.High {
						covered[row]++
					}
				}
				delayN[row]++
				delaySum[row] += float64(clock-r.at) / 1e9
			}
		}
		if q := st.ask; q != nil {
			if a, ok := ask(t, e, q, "", 0); ok {
				if a.At != clock || a.After != int64(i+1) {
					t.Fatalf("step %d: answer registered at time %d after %d, want %d after %d", i, a.At, a.After, clock, i+1)
				}
				ref[q.id] = &rec{a: a, at: clock, pending: true}
				answers[q.row]++
			}
		}
	}
	rep := e.Report(false).Served
	if rep == nil {
		t.Fatal("no served report")
	}
	// Labels come within 3 h, so only answers never labelled can expire:
	// those served 24 h or more before the last event.
	var pending, expired int64
	for _, r := range ref {
		switch {
		case r.pending && r.at <= clock-ttl:
			expired++
		case r.pending:
			pending++
		}
	}
	if expired == 0 {
		t.Fatal("no answer expired; the stream does not test it")
	}
	if rep.Pending != pending || rep.Unmatched != unmatched || rep.LabelOnly != labelOnly || rep.Expired != expired || rep.Evicted != 0 {
		t.Errorf("counts: pending %d unmatched %d label-only %d expired %d evicted %d; reference %d %d %d %d 0",
			rep.Pending, rep.Unmatched, rep.LabelOnly, rep.Expired, rep.Evicted, pending, unmatched, labelOnly, expired)
	}
	rows := append(rep.Learners, *rep.Leader)
	for row, m := range rows {
		if m.Answers != answers[row] || m.Labelled != n[row] || m.Intervals != intervals[row] || m.Delay.N != delayN[row] {
			t.Errorf("%s: answers %d labelled %d intervals %d delays %d; reference %d %d %d %d", m.Name, m.Answers, m.Labelled, m.Intervals, m.Delay.N,
				answers[row], n[row], intervals[row], delayN[row])
			continue
		}
		if n[row] == 0 {
			t.Fatalf("%s: no answer labelled; the stream does not test it", m.Name)
		}
		N := float64(n[row])
		// One partition: the engine adds in label order as the reference
		// does, so the figures agree to the bit.
		for _, c := range []struct {
			what      string
			got, want float64
		}{
			{"rmse", *m.RMSE, math.Sqrt(sumSq[row] / N)},
			{"mae", *m.MAE, sumAbs[row] / N},
			{"bias", *m.Bias, sumErr[row] / N},
			{"coverage", *m.Coverage, float64(covered[row]) / float64(intervals[row])},
			{"width", *m.Width, width[row] / float64(intervals[row])},
			{"mean delay", *m.Delay.MeanSeconds, delaySum[row] / float64(delayN[row])},
		} {
			if c.got != c.want {
				t.Errorf("%s %s = %v, reference %v", m.Name, c.what, c.got, c.want)
			}
		}
		t.Logf("%s: %d answers, %d labelled, served RMSE %.4f, coverage %.3f, mean delay %.0f s", m.Name, m.Answers, m.Labelled, *m.RMSE, *m.Coverage, *m.Delay.MeanSeconds)
	}
}

// TestServedStateSurvivesARestartAndItsLog: the service's two ways back
// after a stop give the state an uninterrupted run reaches, to the bit.
// (1) A restart from the state encoded midway (answers waiting in it). (2)
// A restart from an older state plus the answers logged since (each with the
// offset it was registered after, as the service's served log keeps them),
// read back in a shuffled order and registered before the events replayed —
// as a restart after a crash does.
func TestServedStateSurvivesARestartAndItsLog(t *testing.T) {
	steps := servedStream(4000, 2)
	run := func(e *Engine, from, to int, logged *[]Answer) {
		for i := from; i < to; i++ {
			if _, err := e.Apply(Position{0, int64(i + 1)}, steps[i].ev); err != nil {
				t.Fatal(err)
			}
			if q := steps[i].ask; q != nil {
				if a, ok := ask(t, e, q, "local", int64(i+1)); ok && logged != nil {
					*logged = append(*logged, a)
				}
			}
		}
	}
	whole := servedEngine(t)
	var log []Answer
	run(whole, 0, len(steps), &log)
	want := whole.Digest()
	wantRep := reportJSON(t, whole)

	// (1) encode midway, decode, go on.
	a := servedEngine(t)
	run(a, 0, 2500, nil)
	b := servedEngine(t)
	if err := b.Decode(a.Encode(nil)); err != nil {
		t.Fatal(err)
	}
	run(b, 2500, len(steps), nil)
	if b.Digest() != want || reportJSON(t, b) != wantRep {
		t.Error("a restart from the state midway changed the served state or report")
	}

	// (2) an older state (event 1500), then every answer logged after it
	// (in log order, though registered after events not replayed yet), then
	// the events after it again.
	c := servedEngine(t)
	run(c, 0, 1500, nil)
	d := servedEngine(t)
	if err := d.Decode(c.Encode(nil)); err != nil {
		t.Fatal(err)
	}
	covered := d.ServedLog(0, "local")
	var later []Answer
	for _, x := range log {
		if x.Seq > covered {
			later = append(later, x)
		}
	}
	if len(later) < 100 {
		t.Fatalf("only %d answers after the older state", len(later))
	}
	for _, x := range later {
		if err := d.Serve(x); err != nil {
			t.Fatal(err)
		}
	}
	for _, x := range log[:len(log)/2] { // read again: what the state holds is ignored
		if err := d.Serve(x); err != nil {
			t.Fatal(err)
		}
	}
	for i := 1500; i < len(steps); i++ {
		if _, err := d.Apply(Position{0, int64(i + 1)}, steps[i].ev); err != nil {
			t.Fatal(err)
		}
	}
	if d.Digest() != want || reportJSON(t, d) != wantRep {
		t.Errorf("a restart from an older state and the served log differs from the uninterrupted run:\n%s\nwant\n%s", reportJSON(t, d), wantRep)
	}
}

// TestServedAnswersWaitWithinBounds, hand-worked: with a TTL of one hour on
// the stream clock and room for two answers, (1) a third answer drops the
// oldest (evicted); (2) an answer whose partition's clock passes its serving
// time + 1 h is dropped (expired) and its late label matches nothing; (3) a
// label that arrives before its answer was served matches nothing, and the
// answer still waits.
func TestServedAnswersWaitWithinBounds(t *testing.T) {
	e := mustEngine(t, Config{Served: ServedConfig{Pending: 2, TTL: time.Hour}}, "mean")
	t0 := time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC).UnixNano()
	at := func(min int64) int64 { return t0 + min*servedStepNs }
	apply := func(off int64, ev *Event) {
		t.Helper()
		if _, err := e.Apply(Position{0, off}, ev); err != nil {
			t.Fatal(err)
		}
	}
	serve := func(id string, v float64) {
		t.Helper()
		a := Answer{ID: id, Key: "k", Value: v}
		if err := e.PrepareAnswer(&a); err != nil {
			t.Fatal(err)
		}
		if err := e.Serve(a); err != nil {
			t.Fatal(err)
		}
	}
	apply(1, ev("k", at(0), 10))
	serve("a", 10)
	serve("b", 10)
	serve("c", 10) // evicts a
	if err := e.Serve(Answer{ID: "c", Key: "k"}); err == nil {
		t.Error("a second answer named c was taken")
	}
	apply(2, &Event{Key: "k", Time: at(30), HasTime: true, Target: 13, AnswerID: "a"}) // a was evicted: unmatched
	apply(3, &Event{Key: "k", Time: at(31), HasTime: true, Target: 13, AnswerID: "b"}) // b: error 3, delay 31 min
	apply(4, &Event{Key: "k", Time: at(61), HasTime: true, Target: 10})                // c is 61 min old: expired
	apply(5, &Event{Key: "k", Time: at(62), HasTime: true, Target: 12, AnswerID: "c"}) // unmatched
	apply(6, &Event{Key: "k", Time: at(63), HasTime: true, Target: 12, AnswerID: "d"}) // before d is served: unmatched
	serve("d", 11)
	apply(7, &Event{Key: "k", Time: at(64), HasTime: true, Target: 12, AnswerID: "d"}) // error 1, delay 1 min
	r := e.Report(false).Served
	m := r.Learners[0]
	if r.Evicted != 1 || r.Expired != 1 || r.Unmatched != 3 || r.Pending != 0 {
		t.Errorf("evicted %d expired %d unmatched %d pending %d; want 1 1 3 0", r.Evicted, r.Expired, r.Unmatched, r.Pending)
	}
	// b: 13 − 10 = 3; d: 12 − 11 = 1. RMSE = √((9+1)/2) = √5; delays 31
	// and 1 minutes: mean 16 min = 960 s, max 1860 s.
	if m.Answers != 4 || m.Labelled != 2 || *m.RMSE != math.Sqrt(5) || *m.Bias != 2 || *m.Delay.MeanSeconds != 960 || *m.Delay.MaxSeconds != 1860 {
		t.Errorf("answers %d labelled %d rmse %v bias %v delay mean %v max %v; want 4 2 √5 2 960 1860",
			m.Answers, m.Labelled, *m.RMSE, *m.Bias, *m.Delay.MeanSeconds, *m.Delay.MaxSeconds)
	}
	// 60 s < 1 min ≤ 60 s bucket; 1860 s in the ≤ 3600 s bucket.
	if m.Delay.Buckets[2] != 1 || m.Delay.Buckets[6] != 1 {
		t.Errorf("delay buckets %v: want one at ≤60 s and one at ≤3600 s", m.Delay.Buckets)
	}
}

// TestServedTotalsAddUpAcrossPartitions: an engine split by partition reports,
// through its Totals added, the served figures of the whole.
func TestServedTotalsAddUpAcrossPartitions(t *testing.T) {
	steps := servedStream(3000, 4)
	e := servedEngine(t)
	for i, st := range steps {
		part := int32(0)
		if st.ev.Key == "room-b" {
			part = 1
		}
		if _, err := e.Apply(Position{part, int64(i + 1)}, st.ev); err != nil {
			t.Fatal(err)
		}
		if q := st.ask; q != nil {
			ask(t, e, q, "", 0)
		}
	}
	whole := e.Report(false).Served
	other := e.Split([]int32{1})
	tot := e.Totals()
	if err := tot.Add(other.Totals()); err != nil {
		t.Fatal(err)
	}
	rep, err := e.cfg.ReportOf(tot)
	if err != nil {
		t.Fatal(err)
	}
	got, _ := json.Marshal(rep.Served)
	want, _ := json.Marshal(whole)
	if string(got) != string(want) {
		t.Errorf("split and added:\n%s\nwhole:\n%s", got, want)
	}
}
