package api

import (
	"math"
	"math/rand/v2"
	"strconv"
	"testing"

	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// benchEngine builds the two states the checkpoint issue measures: (a) one
// knn learner with a full window of W = 10 000 events of d = 8 features, and
// (b) one rls learner (d = 8) on each of 1 000 keys. Features and targets are
// Gaussian, rounded to two decimals as sensor readings are; full-precision
// random doubles compress far less (see the note in the README).
func benchEngine(b *testing.B, spec string, keys, events int) *learner.Engine {
	b.Helper()
	s, err := learner.ParseSpec(spec)
	if err != nil {
		b.Fatal(err)
	}
	eng, err := learner.NewEngine(learner.Config{Learners: []learner.Spec{s}})
	if err != nil {
		b.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(1, 2))
	ev := &learner.Event{Features: make([]learner.Feature, 8)}
	for i := 0; i < events; i++ {
		ev.Key = "key-" + strconv.Itoa(i%keys)
		for j := range ev.Features {
			ev.Features[j] = learner.Feature{Name: "f" + strconv.Itoa(j), Num: math.Round(rng.NormFloat64()*100) / 100}
		}
		ev.Target = math.Round(rng.NormFloat64()*1000) / 100
		if _, err := eng.Apply(learner.Position{Offset: int64(i)}, ev); err != nil {
			b.Fatal(err)
		}
	}
	return eng
}

var checkpointCases = []struct {
	name, spec   string
	keys, events int
}{
	{"knn-W10000-d8", "knn:k=10,window=10000", 1, 10_000},
	{"rls-d8-1000keys", "rls:forget=0.99", 1000, 20_000},
}

func BenchmarkCheckpointWrite(b *testing.B) {
	for _, c := range checkpointCases {
		b.Run(c.name, func(b *testing.B) {
			eng := benchEngine(b, c.spec, c.keys, c.events)
			store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: b.TempDir(), Retain: 2})
			if err != nil {
				b.Fatal(err)
			}
			defer store.Close()
			b.ReportAllocs()
			b.ResetTimer()
			var info checkpoint.Info
			for i := 0; i < b.N; i++ {
				if info, err = persist.Save(store, eng, checkpoint.Manual, 0, nil); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(info.Bytes), "bytes")
			b.ReportMetric(float64(info.RawBytes), "raw_bytes")
			b.ReportMetric(float64(info.RawBytes)/float64(info.Bytes), "ratio")
		})
	}
}

func BenchmarkCheckpointLoad(b *testing.B) {
	for _, c := range checkpointCases {
		b.Run(c.name, func(b *testing.B) {
			eng := benchEngine(b, c.spec, c.keys, c.events)
			store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: b.TempDir()})
			if err != nil {
				b.Fatal(err)
			}
			defer store.Close()
			info, err := persist.Save(store, eng, checkpoint.Manual, 0, nil)
			if err != nil {
				b.Fatal(err)
			}
			into := benchEngine(b, c.spec, c.keys, 0)
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				ck, err := store.Load(info.Version)
				if err != nil {
					b.Fatal(err)
				}
				if err := into.DecodeSections(persist.FromCheckpoint(ck.Sections)); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
