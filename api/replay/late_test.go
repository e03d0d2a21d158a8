package replay

import (
	"bytes"
	"context"
	"math"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/learner"
)

// TestLabelDelayScoresWhatWasServed: a replay with labels two hours late
// (1) keeps the prequential figures of a replay without delay, to the byte
// (the events are applied in the same order), and (2) scores as served
// exactly what a reference written out here records: it applies each event
// once its time + 2 h has passed, asks every learner for each event at the
// event's time from the state as it is then, and scores those answers
// against the event's target when it is applied (error, coverage of the
// quoted conformal interval, delay = 2 h).
func TestLabelDelayScoresWhatWasServed(t *testing.T) {
	lines := scenario(t, 3)
	const delay = 2 * time.Hour
	cfg := engineConfig(t, serviceSpecs...)
	run := func(d time.Duration) *learner.Engine {
		eng, _ := learner.NewEngine(cfg)
		h := intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(lines, []byte("\n")), '\n')))
		if err := Replay(context.Background(), h, eng, ReplayConfig{LabelDelay: d}); err != nil {
			t.Fatal(err)
		}
		return eng
	}
	late, now := run(delay).Report(false), run(0).Report(false)
	served := late.Served
	late.Served = nil
	sameJSON(t, "prequential figures with and without a label delay", late, now)
	if served == nil {
		t.Fatal("no served figures")
	}

	// The reference.
	ref, _ := learner.NewEngine(cfg)
	type asked struct {
		value, low, high float64
		interval, ok     bool
	}
	type waiting struct {
		line int64
		ev   learner.Event
		ans  []asked
	}
	nl := len(cfg.Learners)
	var queue []waiting
	var n, covered, ivals [8]int64
	var sumSq [8]float64
	apply := func(w waiting) {
		ref.Apply(learner.Position{Partition: 0, Offset: w.line}, &w.ev)
		for i, a := range w.ans {
			if !a.ok {
				continue
			}
			d := w.ev.Target - a.value
			n[i]++
			sumSq[i] += d * d
			if a.interval {
				ivals[i]++
				if w.ev.Target >= a.low && w.ev.Target <= a.high {
					covered[i]++
				}
			}
		}
	}
	for i, l := range lines {
		var ev learner.Event
		if err := learner.DecodeEvent(l, &ev); err != nil {
			t.Fatal(err)
		}
		for len(queue) > 0 && queue[0].ev.Time+int64(delay) <= ev.Time {
			apply(queue[0])
			queue = queue[1:]
		}
		w := waiting{line: int64(i + 1), ev: ev, ans: make([]asked, nl)}
		for j := range nl {
			p, err := ref.Predict(ev.Key, cfg.Learners[j].Name, &ev)
			if err != nil {
				continue
			}
			w.ans[j] = asked{value: p.Value, ok: true}
			if p.Conformal != nil {
				w.ans[j].low, w.ans[j].high, w.ans[j].interval = p.Value-*p.Conformal, p.Value+*p.Conformal, true
			}
		}
		queue = append(queue, w)
	}
	for _, w := range queue {
		apply(w)
	}
	for i, m := range served.Learners {
		N := float64(n[i])
		if m.Labelled != n[i] || m.Answers != n[i] || m.Intervals != ivals[i] {
			t.Errorf("%s: %d answers, %d labelled, %d intervals; reference %d, %d, %d", m.Name, m.Answers, m.Labelled, m.Intervals, n[i], n[i], ivals[i])
			continue
		}
		if *m.RMSE != math.Sqrt(sumSq[i]/N) || *m.Coverage != float64(covered[i])/float64(ivals[i]) ||
			*m.Delay.MeanSeconds != delay.Seconds() || *m.Delay.MaxSeconds != delay.Seconds() {
			t.Errorf("%s: served rmse %v coverage %v delay %v..%v s; reference %v %v %v s", m.Name, *m.RMSE, *m.Coverage,
				*m.Delay.MeanSeconds, *m.Delay.MaxSeconds, math.Sqrt(sumSq[i]/N), float64(covered[i])/float64(ivals[i]), delay.Seconds())
		}
		t.Logf("%s: served RMSE %.3f with labels 2 h late, prequential %.3f", m.Name, *m.RMSE, *now.Learners[i].RMSE)
	}
	if served.Pending != 0 || served.Unmatched != 0 || served.Expired != 0 {
		t.Errorf("pending %d unmatched %d expired %d, want none", served.Pending, served.Unmatched, served.Expired)
	}
}
