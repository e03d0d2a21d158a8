package main

import (
	"bytes"
	"context"
	"fmt"
	"io"

	"tidemark/api"
	"tidemark/api/intake"
	"tidemark/bench/synth"
	"tidemark/learner"
)

// demoLearners is the demo's set: windowed k-NN, forgetting RLS, cumulative
// RLS, sliding-window RLS and the mean baseline. Windows count events per key
// (one room reports 288 readings a day).
var demoLearners = []string{
	"knn:k=10,window=2016,name=knn-week",
	"rls:forget=0.995,name=rls-forget",
	"rls:forget=1,name=rls-cumulative",
	"sliding-rls:window=864,name=sliding-rls-3d",
	"mean:window=288,name=mean-day",
}

func runDemo(args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("demo", "demo [--days N] [--seed S] [--json]", stderr)
	days := fs.Int("days", 14, "days of the demo scenario")
	seed := fs.Uint64("seed", 1, "random seed of the scenario")
	asJSON := fs.Bool("json", false, "print the report as JSON")
	if _, err := parse(fs, args); err != nil {
		return err
	}
	if *days < 1 || *days > 366 {
		return usagef("--days %d: want 1 to 366", *days)
	}
	var buf bytes.Buffer
	if _, err := synth.Write(&buf, synth.Config{Days: *days, Seed: *seed}); err != nil {
		return err
	}
	ef := engineFlags{learners: demoLearners, timeFeatures: true, hashBuckets: 4, maxKeys: learner.DefaultMaxKeys}
	cfg, err := ef.config()
	if err != nil {
		return err
	}
	eng, err := learner.NewEngine(cfg)
	if err != nil {
		return err
	}
	if !*asJSON {
		fmt.Fprintf(stdout, "tidemark demo: %d days of a fictional cold-storage warehouse (invented data; see `tidemark synth --help`),\n"+
			"three rooms, a reading every five minutes, an insulation fault in room-b from mid-run, a stuck outdoor sensor,\n"+
			"and five malformed lines. Every learner predicts each event before it trains on it.\n\n", *days)
	}
	err = api.Replay(context.Background(), intake.NewHistoryReader(&buf), eng, api.ReplayConfig{Log: stderr})
	if err != nil {
		return err
	}
	return writeReport(stdout, eng.Report(false), *asJSON)
}
