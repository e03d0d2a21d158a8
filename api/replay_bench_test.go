package api

import (
	"bytes"
	"context"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/bench/synth"
	"tidemark/learner"
)

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
			for _, s := range DemoLearners {
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
