package main

import (
	"bytes"
	"context"
	"fmt"
	"strings"
	"time"

	"tidemark/api/intake"
	"tidemark/api/replay"
	"tidemark/bench/synth"
	"tidemark/learner"
)

// intervalCoverage is issue 16's measure of the intervals: over the demo
// scenario (14 days, the five learners of the demo), the coverage and mean
// width each method achieved at the nominal level, over the whole run and
// over the 24 hours after the insulation fault (from the middle of the run).
func intervalCoverage() string {
	const days = 14
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: days, Seed: 1})
	cfg := learner.Config{Features: learner.FeatureConfig{HashBuckets: 4, TimeFeatures: true}}
	for _, s := range synth.Learners {
		sp, err := learner.ParseSpec(s)
		if err != nil {
			panic(err)
		}
		cfg.Learners = append(cfg.Learners, sp)
	}
	eng, err := learner.NewEngine(cfg)
	if err != nil {
		panic(err)
	}
	fault := synth.Start.Add(days * 12 * time.Hour).UnixNano()
	dayAfter := fault + int64(24*time.Hour)
	var atFault, atDayAfter []learner.LearnerReport
	observe := func(_ int64, ev *learner.Event, e *learner.Engine) {
		switch {
		case atFault == nil && ev.Time >= fault:
			atFault = e.Report(false).Learners
		case atDayAfter == nil && ev.Time >= dayAfter:
			atDayAfter = e.Report(false).Learners
		}
	}
	if err := replay.Replay(context.Background(), intake.NewHistoryReader(&buf), eng, replay.ReplayConfig{Observe: observe}); err != nil {
		panic(err)
	}
	end := eng.Report(false).Learners
	var b strings.Builder
	fmt.Fprintf(&b, "intervals at nominal %.2f, demo scenario (%d days): coverage (mean width, kW), normal · conformal\n", learner.DefaultLevel, days)
	fmt.Fprintf(&b, "  %-16s %-30s %s\n", "learner", "whole run", "24 h after the insulation fault")
	for i, l := range end {
		whole := fmt.Sprintf("%.3f (%.2f) · %.3f (%.2f)", *l.Coverage, *l.Width, *l.Conformal.Coverage, *l.Conformal.Width)
		fmt.Fprintf(&b, "  %-16s %-30s %s\n", l.Name, whole, windowFigures(atFault[i], atDayAfter[i]))
	}
	return b.String()
}

// windowFigures are the coverage and mean width of each method over the
// intervals quoted between two reports of one learner.
func windowFigures(a, b learner.LearnerReport) string {
	n := float64(b.Intervals - a.Intervals)
	if n <= 0 || a.Coverage == nil {
		return "–"
	}
	held := func(x, y *float64, na, nb int64) float64 { return (*y*float64(nb) - *x*float64(na)) / n }
	return fmt.Sprintf("%.3f (%.2f) · %.3f (%.2f)",
		held(a.Coverage, b.Coverage, a.Intervals, b.Intervals), held(a.Width, b.Width, a.Intervals, b.Intervals),
		held(a.Conformal.Coverage, b.Conformal.Coverage, a.Intervals, b.Intervals), held(a.Conformal.Width, b.Conformal.Width, a.Intervals, b.Intervals))
}
