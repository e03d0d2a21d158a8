package synth_test

import (
	"bytes"
	"context"
	"strings"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/api/replay"
	"tidemark/bench/synth"
	"tidemark/learner"
)

type alarm struct {
	learner, key string
	at           time.Time
}

// TestScenarioShowsWhyOnlineLearningMatters replays 14 days of the scenario
// through the demo's kinds of learner and checks what the scenario is meant
// to show: the best learner beats the mean baseline by at least 20 % RMSE,
// Page–Hinkley raises an alarm on room-b within a few hours of the
// insulation fault, and the malformed records are rejected by line number.
func TestScenarioShowsWhyOnlineLearningMatters(t *testing.T) {
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: 14, Seed: 1})
	cfg := learner.Config{Features: learner.FeatureConfig{HashBuckets: 4, TimeFeatures: true}}
	for _, s := range []string{"knn:k=10,window=2016", "rls:forget=0.995", "rls:forget=1", "sliding-rls:window=864", "mean:window=288"} {
		sp, _ := learner.ParseSpec(s)
		cfg.Learners = append(cfg.Learners, sp)
	}
	eng, _ := learner.NewEngine(cfg)
	var alarms []alarm
	seen := make([]int64, len(cfg.Learners))
	var log strings.Builder
	rc := replay.ReplayConfig{Log: &log, Observe: func(_ int64, ev *learner.Event, e *learner.Engine) {
		for i := range seen {
			if a := e.LearnerAlarms(i); a != seen[i] {
				seen[i] = a
				la := e.Report(false).Learners[i].Drift.LastAlarm
				alarms = append(alarms, alarm{cfg.Learners[i].Name, la.Key, time.Unix(0, ev.Time).UTC()})
			}
		}
	}}
	if err := replay.Replay(context.Background(), intake.NewHistoryReader(&buf), eng, rc); err != nil {
		t.Fatal(err)
	}
	rep := eng.Report(false)
	base := *rep.Learners[4].RMSE
	best := base
	for _, l := range rep.Learners[:4] {
		best = min(best, *l.RMSE)
	}
	if best > 0.8*base { // the requirement: 20 % better than the mean baseline
		t.Errorf("best RMSE %.3f is not 20%% below the mean baseline's %.3f", best, base)
	}
	onset := synth.Start.Add(7 * 24 * time.Hour) // the middle of 14 days
	var first *alarm
	for i, a := range alarms {
		if a.key == "room-b" && !a.at.Before(onset) {
			first = &alarms[i]
			break
		}
	}
	if first == nil || first.at.Sub(onset) > 4*time.Hour { // "within a few hours", the issue says; 4 h is our reading
		t.Errorf("no alarm on room-b within 4 h of the fault at %s; alarms: %v", onset, alarms)
	} else {
		t.Logf("first alarm on room-b: %s, %v after the fault", first.learner, first.at.Sub(onset))
	}
	if rep.Rejected != 5 {
		t.Errorf("%d rejected, want the 5 malformed records", rep.Rejected)
	}
	for _, line := range []string{"line 2020: ", "line 4037: ", "line 6054: ", "line 8071: ", "line 10088: "} {
		if !strings.Contains(log.String(), line) {
			t.Errorf("rejections do not name %q:\n%s", line, log.String())
		}
	}
}
