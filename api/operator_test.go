package api

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/api/replay"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// TestOperatorStory: a burst of bad data between two times poisons the
// model; the drift alarm fires during it and pins the checkpoint taken before
// it; the operator restores that checkpoint skipping the burst's time range;
// afterwards the service predicts exactly what a run that never saw the burst
// predicts.
func TestOperatorStory(t *testing.T) {
	lines := scenario(t, 3)
	burstFrom := time.Date(2026, 3, 2, 10, 0, 0, 0, time.UTC)
	burstTo := burstFrom.Add(3 * time.Hour)
	var poisoned, clean [][]byte
	firstBurst := 0
	var ev learner.Event
	for _, l := range lines {
		learner.DecodeEvent(l, &ev)
		at := time.Unix(0, ev.Time).UTC()
		if !at.Before(burstFrom) && at.Before(burstTo) {
			// a bad upstream deploy: a stray digit in front of every reading
			bad := bytes.Replace(l, []byte(`"target":`), []byte(`"target":3`), 1)
			if firstBurst == 0 {
				firstBurst = len(poisoned) + 1
			}
			poisoned = append(poisoned, bad)
			continue
		}
		poisoned = append(poisoned, l)
		clean = append(clean, l)
	}
	cfg := testConfig(t, t.TempDir())
	cfg.CheckpointEvery = 60
	r := start(t, cfg)
	r.post(t, "", poisoned)
	rep := r.waitCovered(t, int64(len(poisoned)))

	alarmed := false
	for _, l := range rep.Learners {
		if a := l.Drift.LastAlarm; a != nil && a.Position.Offset >= int64(firstBurst) {
			alarmed = true
		}
	}
	if !alarmed {
		t.Fatalf("no drift alarm during or after the burst: %+v", rep.Learners)
	}
	_, b := r.call(t, "GET", "/v1/checkpoints", "", nil)
	var list []checkpoint.Info
	json.Unmarshal(b, &list)
	var before *checkpoint.Info
	for i := range list {
		c := &list[i]
		if c.Pinned && c.Position[0].Offset < int64(firstBurst) && (before == nil || c.Version > before.Version) {
			before = c
		}
	}
	if before == nil {
		t.Fatalf("no pinned checkpoint from before the burst (offset %d): %+v", firstBurst, list)
	}
	body := fmt.Sprintf(`{"resume":"skip","skip_from_time":%q,"skip_to_time":%q}`, burstFrom.Format(time.RFC3339), burstTo.Format(time.RFC3339))
	if code, b := r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", before.Version), "", []byte(body)); code != 200 {
		t.Fatalf("restore: %d %s", code, b)
	}
	r.waitCovered(t, int64(len(poisoned)))
	time.Sleep(3 * DefaultPublishEvery / 2)

	ref, _ := learner.NewEngine(engineConfig(t, serviceSpecs...))
	replay.Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(clean, []byte("\n")), '\n'))), ref, replay.ReplayConfig{})
	for _, key := range []string{"room-a", "room-b", "room-c"} {
		row := fmt.Sprintf(`{"key":%q,"time":"2026-03-03T18:00:00Z","features":{"outdoor_c":11,"door_min":1,"shift":"late"}}`, key)
		for _, name := range serviceSpecs {
			code, b := r.call(t, "POST", "/v1/predict", "", []byte(fmt.Sprintf(`{"learner":%q,"rows":[%s]}`, name, row)))
			var resp PredictResponse
			json.Unmarshal(b, &resp)
			var q learner.Event
			learner.DecodeRow([]byte(row), &q)
			want, _ := ref.Predict(key, name, &q)
			if code != 200 || resp.Predictions[0].Prediction != want.Value {
				t.Errorf("%s %s: predicts %v after the restore, a run that never saw the burst %v", key, name, resp.Predictions, want.Value)
			}
		}
	}
	t.Logf("burst of %d events from offset %d; restored pinned checkpoint %d (offset %d), skipped the burst",
		len(poisoned)-len(clean), firstBurst, before.Version, before.Position[0].Offset)
}

// TestDriftPinsAreCapped: automatic pins before drift alarms keep only the
// newest MaxDriftPins; a pin an operator made stays.
func TestDriftPinsAreCapped(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.CheckpointEvery, cfg.MaxDriftPins, cfg.Retain = 50, 2, 3
	r := start(t, cfg)
	lines := scenario(t, 3)
	r.post(t, "", lines[:200])
	r.waitCovered(t, 200)
	vs, _ := r.svc.loop.store.Versions()
	mine := vs[len(vs)-1]
	if err := r.svc.loop.store.Pin(mine); err != nil { // the operator's
		t.Fatal(err)
	}
	r.post(t, "", lines[200:])
	r.waitCovered(t, int64(len(lines)))
	pins, _ := r.svc.loop.store.Pins()
	drift := 0
	for _, why := range pins {
		if why == "drift" {
			drift++
		}
	}
	if why, ok := pins[mine]; !ok || why != "" || drift != 2 {
		t.Errorf("pins %v: want the operator's version %d and exactly 2 drift pins", pins, mine)
	}
	if rep := r.report(t); rep.Learners[3].Drift.Alarms < 3 {
		t.Errorf("only %d alarms: the cap was not exercised", rep.Learners[3].Drift.Alarms)
	}
}
