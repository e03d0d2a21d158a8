package replay

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/bench/synth"
	"tidemark/learner"
)

// The helpers below are the service tests' own (api/service_test.go), kept
// here so that these tests moved with the replay code.

var serviceSpecs = []string{"knn:k=5,window=200", "rls:forget=0.99", "sliding-rls:window=100", "mean:window=50"}

func engineConfig(t testing.TB, specs ...string) learner.Config {
	t.Helper()
	cfg := learner.Config{Features: learner.FeatureConfig{HashBuckets: 4, TimeFeatures: true}}
	for _, s := range specs {
		sp, err := learner.ParseSpec(s)
		if err != nil {
			t.Fatal(err)
		}
		cfg.Learners = append(cfg.Learners, sp)
	}
	return cfg
}

func scenario(t testing.TB, days int) [][]byte {
	t.Helper()
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: days, Seed: 9})
	var out [][]byte
	var ev learner.Event
	for _, l := range bytes.Split(bytes.TrimSpace(buf.Bytes()), []byte("\n")) {
		if learner.DecodeEvent(l, &ev) == nil {
			out = append(out, l)
		}
	}
	return out
}

func sameJSON(t testing.TB, what string, got, want any) {
	t.Helper()
	g, _ := json.Marshal(got)
	w, _ := json.Marshal(want)
	if !bytes.Equal(g, w) {
		t.Errorf("%s differ:\n got %.600s\nwant %.600s", what, g, w)
	}
}

func TestReplayPipelineEqualsSequential(t *testing.T) {
	lines := scenario(t, 3)
	run := func(seq bool) *learner.Engine {
		eng, _ := learner.NewEngine(engineConfig(t, serviceSpecs...))
		h := intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(lines, []byte("\n")), '\n')))
		if err := Replay(context.Background(), h, eng, ReplayConfig{Sequential: seq}); err != nil {
			t.Fatal(err)
		}
		return eng
	}
	if a, b := run(false), run(true); a.Digest() != b.Digest() || a.Applied() != int64(len(lines)) {
		t.Errorf("pipelined and single-goroutine replays differ (applied %d and %d)", a.Applied(), b.Applied())
	}
}

func TestReplayParallelEqualsSingle(t *testing.T) {
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: 3, Seed: 2}) // malformed lines included
	cfg := engineConfig(t, "knn:k=3,window=300", "rls:forget=0.99", "mean:window=100", "knn:k=7,window=all,max=500",
		"sliding-rls:window=200", "rls:half_life=6h", "mean")
	single, _ := learner.NewEngine(cfg)
	if err := Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(buf.Bytes())), single, ReplayConfig{}); err != nil {
		t.Fatal(err)
	}
	want := single.Report(true)
	for _, workers := range []int{2, 3, 7} {
		got, err := ReplayParallel(context.Background(), intake.NewHistoryReader(bytes.NewReader(buf.Bytes())), cfg, workers, ReplayConfig{})
		if err != nil {
			t.Fatal(err)
		}
		sameJSON(t, fmt.Sprintf("%d workers against one engine", workers), got, want)
	}
}

// BenchmarkReplay: per event, a replay of the synthetic scenario through the
// demo's five learners, pipelined (decoding on a second goroutine) and on
// one goroutine. Run with -benchtime 1000000x for the million-event figure.
func BenchmarkReplay(b *testing.B) {
	for _, mode := range []struct {
		name     string
		seq      bool
		parallel bool
	}{{"pipelined", false, false}, {"sequential", true, false}, {"learners-spread", false, true}} {
		b.Run(mode.name, func(b *testing.B) {
			days := b.N/864 + 1
			var buf bytes.Buffer
			synth.Write(&buf, synth.Config{Days: days, Seed: 2})
			cfg := learner.Config{Features: learner.FeatureConfig{HashBuckets: 4, TimeFeatures: true}}
			for _, s := range synth.Learners {
				sp, _ := learner.ParseSpec(s)
				cfg.Learners = append(cfg.Learners, sp)
			}
			eng, _ := learner.NewEngine(cfg)
			b.ReportAllocs()
			b.ResetTimer()
			t0 := time.Now()
			h := intake.NewHistoryReader(bytes.NewReader(buf.Bytes()))
			if mode.parallel {
				rep, err := ReplayParallel(context.Background(), h, cfg, 0, ReplayConfig{})
				if err != nil {
					b.Fatal(err)
				}
				b.ReportMetric(float64(rep.Events)/time.Since(t0).Seconds(), "events/s")
				return
			}
			if err := Replay(context.Background(), h, eng, ReplayConfig{Sequential: mode.seq}); err != nil {
				b.Fatal(err)
			}
			el := time.Since(t0)
			b.ReportMetric(float64(eng.Applied())/el.Seconds(), "events/s")
			b.ReportMetric(float64(eng.Applied()), "events")
		})
	}
}
