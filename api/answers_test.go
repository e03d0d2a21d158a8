package api

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"

	"tidemark/checkpoint"
	"tidemark/learner"
)

// servedRef is the hand-built reference of served scoring: every answer the
// service returned, as returned, and what its label makes of it.
type servedRef struct {
	answers  map[string]*refAnswer
	clock    int64 // the latest event time posted (the stream's clock)
	n        [8]int64
	sumSq    [8]float64
	sumErr   [8]float64
	covered  [8]int64
	ivals    [8]int64
	delayN   [8]int64
	delaySum [8]float64
}

type refAnswer struct {
	row       int
	value     float64
	low, high float64
	interval  bool
	at        int64
	line      []byte // the event it predicted, posted later as its label
	only      bool   // labelled by a label-only message
	done      bool
}

// label scores answer id against target y as the service should: label −
// the value served, interval held or not, delay on the stream clock.
func (r *servedRef) label(id string, y float64) {
	a := r.answers[id]
	if a == nil || a.done {
		return
	}
	a.done = true
	d := y - a.value
	r.n[a.row]++
	r.sumSq[a.row] += d * d
	r.sumErr[a.row] += d
	if a.interval {
		r.ivals[a.row]++
		if y >= a.low && y <= a.high {
			r.covered[a.row]++
		}
	}
	r.delayN[a.row]++
	r.delaySum[a.row] += float64(r.clock-a.at) / 1e9
}

// TestServedScoresSurviveRestartsAndRestores: answers served over HTTP,
// labelled by events posted 0 to 3 rounds later (some by label-only
// messages), are scored exactly as a reference written out here that
// records each answer as returned and scores it when its label is posted —
// across a restart in the middle and a restore from an earlier checkpoint
// that replays the events and reads the answer log back. Also: an
// answer_id given twice is refused; the answer log is where DESIGN's map of
// the data directory says.
func TestServedScoresSurviveRestartsAndRestores(t *testing.T) {
	lines := scenario(t, 2)
	dir := t.TempDir()
	defer func(n int64) { answerLogBytes = n }(answerLogBytes)
	answerLogBytes = 1024 // small segments, so that the log forgets some
	cfg := testConfig(t, dir)
	cfg.Retain = 3
	r := start(t, cfg)
	const warm = 600
	r.post(t, "", lines[:warm])
	posted := int64(warm)
	r.waitCovered(t, posted)
	ref := &servedRef{answers: map[string]*refAnswer{}}
	var ev learner.Event
	for _, l := range lines[:warm] {
		learner.DecodeEvent(l, &ev)
		ref.clock = max(ref.clock, ev.Time)
	}
	rng := rand.New(rand.NewPCG(16, 2))
	due := map[int][]string{}
	var restoreTo uint64
	names := append([]string{}, serviceSpecs...)
	round := 0
	for i := warm; i < len(lines); i += 40 {
		chunk := lines[i:min(i+40, len(lines))]
		var batch [][]byte
		for j, l := range chunk {
			learner.DecodeEvent(l, &ev)
			if j%5 != 0 {
				batch = append(batch, l)
				continue
			}
			// A question about this event: predict it now, label it later.
			row := (i/40 + j) % len(names)
			id := fmt.Sprintf("q-%d", i+j)
			body := fmt.Sprintf(`{"learner":%q,"answer_id":%q,%s`, names[row], id, bytes.TrimPrefix(l, []byte("{")))
			code, b := r.call(t, "POST", "/v1/predict", "", []byte(body))
			if code != 200 {
				t.Fatalf("predict: %d %s", code, b)
			}
			var resp PredictResponse
			if err := json.Unmarshal(b, &resp); err != nil || resp.PredictAnswer == nil || resp.AnswerID != id {
				t.Fatalf("predict answer %s: want answer_id %q", b, id)
			}
			a := &refAnswer{row: row, value: resp.Prediction, at: ref.clock, line: l, only: rng.IntN(4) == 0}
			if iv := resp.Interval; iv != nil {
				a.low, a.high, a.interval = iv.Low, iv.High, true
			}
			ref.answers[id] = a
			if a.only {
				batch = append(batch, l) // the event trains now; a label-only message comes later
			}
			lag := rng.IntN(4)
			due[round+lag] = append(due[round+lag], id)
		}
		for _, id := range due[round] {
			a := ref.answers[id]
			learner.DecodeEvent(a.line, &ev)
			if a.only {
				batch = append(batch, fmt.Appendf(nil, `{"answer_id":%q,"key":%q,"target":%v}`, id, ev.Key, ev.Target))
			} else {
				batch = append(batch, fmt.Appendf(nil, `{"answer_id":%q,%s`, id, bytes.TrimPrefix(a.line, []byte("{"))))
			}
		}
		delete(due, round)
		for _, l := range batch {
			var e learner.Event
			learner.DecodeEvent(l, &e)
			if !e.LabelOnly {
				ref.clock = max(ref.clock, e.Time)
			}
			if e.AnswerID != "" {
				ref.label(e.AnswerID, e.Target)
			}
		}
		r.post(t, "", batch)
		posted += int64(len(batch))
		r.waitCovered(t, posted)
		round++
		switch round {
		case 5:
			code, b := r.call(t, "POST", "/v1/checkpoints", "", nil)
			if code != 201 {
				t.Fatalf("POST /v1/checkpoints: %d %s", code, b)
			}
			var info struct{ Version uint64 }
			json.Unmarshal(b, &info)
			restoreTo = info.Version
			if code, b := r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/pin", restoreTo), "", []byte(`{"pinned":true}`)); code != 200 {
				t.Fatalf("pin: %d %s", code, b)
			}
		case 10:
			// A restart in the middle.
			if err := r.stop(); err != nil {
				t.Fatal(err)
			}
			r = start(t, cfg)
			r.waitCovered(t, posted)
		case 15:
			// Back to round 5's checkpoint: the events since are replayed,
			// and the answers since are read back from their log.
			code, b := r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", restoreTo), "", []byte(`{"resume":"from_checkpoint"}`))
			if code != 200 {
				t.Fatalf("restore: %d %s", code, b)
			}
			r.waitCovered(t, posted)
		}
	}
	var code int
	var b []byte
	// An id that waits for its label already is refused.
	var waiting string
	for id, a := range ref.answers {
		if !a.done {
			waiting = id
			break
		}
	}
	if waiting == "" {
		t.Fatal("every answer was labelled; the test wants one waiting")
	}
	code, b = r.call(t, "POST", "/v1/predict", "", []byte(fmt.Sprintf(`{"answer_id":%q,%s`, waiting, bytes.TrimPrefix(lines[0], []byte("{")))))
	if code != 409 {
		t.Errorf("an answer_id already waiting: %d %s, want 409", code, b)
	}
	// Checkpoints pinned before drift alarms hold none of the answers (a
	// restore to one reads the whole log again); unpinned, and with one
	// more checkpoint, only round 5's pinned one and the newest 3 remain.
	_, b = r.call(t, "GET", "/v1/checkpoints", "", nil)
	var infos []checkpoint.Info
	json.Unmarshal(b, &infos)
	for _, in := range infos {
		if in.Pinned && in.Version != restoreTo {
			if code, b := r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/pin", in.Version), "", []byte(`{"pinned":false}`)); code != 200 {
				t.Fatalf("unpin: %d %s", code, b)
			}
		}
	}
	if code, b := r.call(t, "POST", "/v1/checkpoints", "", nil); code != 201 {
		t.Fatalf("POST /v1/checkpoints: %d %s", code, b)
	}
	logs, _ := filepath.Glob(filepath.Join(dir, "answers", "partition-00000", "local", "seg-*.wal"))
	if len(logs) == 0 {
		t.Fatal("no answer log in DATA/answers/partition-00000/local")
	}
	// The log forgot the answers every retained checkpoint holds (its
	// first segments), and no more: the restarts below still read what
	// they need.
	if first := filepath.Base(logs[0]); first == "seg-00000000000000000001.wal" {
		t.Errorf("the answer log kept its first segment (%d segments) although every retained checkpoint holds its answers", len(logs))
	}

	check := func(what string, rep learner.Report) {
		t.Helper()
		s := rep.Served
		if s == nil {
			t.Fatalf("%s: no served figures", what)
		}
		var pending int64
		for _, a := range ref.answers {
			if !a.done {
				pending++
			}
		}
		if s.Pending != pending || s.Expired != 0 || s.Unmatched != 0 {
			t.Errorf("%s: pending %d expired %d unmatched %d; reference %d 0 0", what, s.Pending, s.Expired, s.Unmatched, pending)
		}
		for row, m := range s.Learners {
			n := ref.n[row]
			if n == 0 || m.Labelled != n || m.Intervals != ref.ivals[row] || m.Delay.N != ref.delayN[row] {
				t.Errorf("%s: %s labelled %d (intervals %d, delays %d); reference %d (%d, %d)", what, m.Name, m.Labelled, m.Intervals, m.Delay.N, n, ref.ivals[row], ref.delayN[row])
				continue
			}
			N := float64(n)
			// One partition, labels in the order posted: equal to the bit.
			if *m.RMSE != math.Sqrt(ref.sumSq[row]/N) || *m.Bias != ref.sumErr[row]/N ||
				*m.Coverage != float64(ref.covered[row])/float64(ref.ivals[row]) || *m.Delay.MeanSeconds != ref.delaySum[row]/float64(ref.delayN[row]) {
				t.Errorf("%s: %s served rmse %v bias %v coverage %v delay %v; reference %v %v %v %v", what, m.Name, *m.RMSE, *m.Bias, *m.Coverage, *m.Delay.MeanSeconds,
					math.Sqrt(ref.sumSq[row]/N), ref.sumErr[row]/N, float64(ref.covered[row])/float64(ref.ivals[row]), ref.delaySum[row]/float64(ref.delayN[row]))
			}
		}
	}
	rep := r.report(t)
	check("after a restart and a restore", rep)
	_, metrics := r.call(t, "GET", "/metrics", "", nil)
	for row, name := range names {
		want := fmt.Sprintf("tidemark_answers_labelled_total{learner=%q} %d", name, ref.n[row])
		if !bytes.Contains(metrics, []byte(want)) {
			t.Errorf("/metrics lacks %s", want)
		}
	}
	for _, want := range []string{"tidemark_answer_rmse{learner=", "tidemark_answers_pending ", "tidemark_answer_label_delay_seconds_bucket{learner="} {
		if !bytes.Contains(metrics, []byte(want)) {
			t.Errorf("/metrics lacks %s", want)
		}
	}
	for _, m := range rep.Served.Learners {
		pre := 0.0
		for _, l := range rep.Learners {
			if l.Name == m.Name {
				pre = *l.RMSE
			}
		}
		t.Logf("%s: %d answers labelled, served RMSE %.3f (prequential %.3f), mean label delay %.0f s", m.Name, m.Labelled, *m.RMSE, pre, *m.Delay.MeanSeconds)
	}
	// Once more after a stop that leaves the state at round 5's checkpoint,
	// as a crash does that takes the checkpoints after it (a kill -9 keeps
	// them; this is the harder case): the answers since are read back from
	// their log and the events since replayed, and the figures are the same.
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	vs, err := checkpointVersions(filepath.Join(dir, "checkpoints"))
	if err != nil {
		t.Fatal(err)
	}
	for _, v := range vs {
		if v > restoreTo {
			if err := os.Remove(filepath.Join(dir, "checkpoints", checkpoint.FileName(v))); err != nil {
				t.Fatal(err)
			}
		}
	}
	r = start(t, cfg)
	r.waitCovered(t, posted)
	check("after a restart from round 5's checkpoint", r.report(t))
}

// checkpointVersions lists the versions of the store in dir.
func checkpointVersions(dir string) ([]uint64, error) {
	s, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: dir, ReadOnly: true})
	if err != nil {
		return nil, err
	}
	defer s.Close()
	return s.Versions()
}
