package learner

import (
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
)

// Benchmarks of the hot path. Their floors (a plain distance scan, the
// covariance-form RLS update) and the ratios live in the harness,
// go run ./bench, which measures each case beside its floor in one run.

func randRows(n, d int, seed uint64) [][]float64 {
	rng := rand.New(rand.NewPCG(seed, 1))
	out := make([][]float64, n)
	for i := range out {
		out[i] = make([]float64, d)
		for j := range out[i] {
			out[i][j] = rng.NormFloat64()
		}
	}
	return out
}

func fullKNN(b *testing.B, w, d int, scale string) (*KNN, [][]float64) {
	s, err := ParseSpec("knn:k=10,window=" + strconv.Itoa(w) + ",scale=" + scale)
	if err != nil {
		b.Fatal(err)
	}
	m := New(&s, d).(*KNN)
	rows := randRows(w+1024, d, 1)
	for i := 0; i < w; i++ {
		m.Learn(rows[i], rows[i][0], 0)
	}
	return m, rows[w:]
}

func BenchmarkKNNPredict(b *testing.B) {
	for _, scale := range []string{"zscore", "none"} {
		b.Run("W=10000,d=8,k=10,scale="+scale, func(b *testing.B) {
			m, qs := fullKNN(b, 10000, 8, scale)
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				m.Predict(qs[i%len(qs)])
			}
		})
	}
}

func BenchmarkKNNLearn(b *testing.B) {
	m, qs := fullKNN(b, 10000, 8, "zscore")
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		m.Learn(qs[i%len(qs)], 1, 0)
	}
}

func BenchmarkRLSUpdate(b *testing.B) {
	for _, d := range []int{2, 8, 32} {
		b.Run("d="+strconv.Itoa(d), func(b *testing.B) {
			s, _ := ParseSpec("rls:forget=0.999")
			m := New(&s, d)
			rows := randRows(1024, d, 2)
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				x := rows[i%len(rows)]
				m.Learn(x, x[0], 0)
			}
		})
	}
}

func BenchmarkSlidingRLSUpdate(b *testing.B) {
	s, _ := ParseSpec("sliding-rls:window=500")
	m := New(&s, 8)
	rows := randRows(1024, 8, 3)
	for i := 0; i < 1000; i++ {
		m.Learn(rows[i%len(rows)], rows[i%len(rows)][0], 0)
	}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		x := rows[i%len(rows)]
		m.Learn(x, x[0], 0)
	}
}

// BenchmarkReport: a report over 10 000 keys, as the service builds one every
// curve point and every published snapshot.
func BenchmarkReport(b *testing.B) {
	s, _ := ParseSpec("rls:forget=0.99")
	e, _ := NewEngine(Config{Learners: []Spec{s}})
	ev := &Event{Features: []Feature{{Name: "x", Num: 1}}}
	for i := 0; i < 30_000; i++ {
		ev.Key = "key-" + strconv.Itoa(i%10_000)
		ev.Target = float64(i % 7)
		e.Apply(Position{Offset: int64(i)}, ev)
	}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		e.Report(false)
	}
}

// keysEngine returns an engine of rls (d = 8) and the given mean spec, with
// cfg's other settings and a cap of nk keys; nk key names; and an event of
// eight features to fill in.
func keysEngine(nk int, meanSpec string, cfg Config) (*Engine, []string, *Event) {
	rls, _ := ParseSpec("rls:forget=0.99")
	mean, _ := ParseSpec(meanSpec)
	cfg.Learners, cfg.MaxKeys = []Spec{rls, mean}, nk
	e, _ := NewEngine(cfg)
	keys := make([]string, nk)
	for i := range keys {
		keys[i] = "meter-" + strconv.Itoa(i)
	}
	ev := &Event{Features: make([]Feature, 8)}
	for j := range ev.Features {
		ev.Features[j].Name = "x" + strconv.Itoa(j)
	}
	return e, keys, ev
}

// BenchmarkApplyKeys applies events of rls (d=8) + mean:window=100 spread
// over 1 or 10⁶ keys (issue 13's case): the cost of an event should not
// depend on how many keys the state holds. Keys are visited in a scattered
// order, as a real stream would; the first visit of a key creates it.
func BenchmarkApplyKeys(b *testing.B) {
	type run struct {
		name string
		nk   int
		cfg  Config
	}
	runs := []run{{"keys=1", 1, Config{}}, {"keys=1000000", 1_000_000, Config{}},
		// what the per-key leader and ADWIN cost beside the run of keys=1
		{"keys=1/leader", 1, Config{Leader: LeaderConfig{On: true}}}, {"keys=1/adwin", 1, Config{Drift: DriftConfig{Method: DriftADWIN}}},
		// served scoring: every event is the label of an answer served
		// 100 events before it (registered, waiting, matched, scored)
		{"keys=1/served", 1, Config{}}}
	for _, r := range runs {
		nk := r.nk
		b.Run(r.name, func(b *testing.B) {
			e, keys, ev := keysEngine(nk, "mean:window=100", r.cfg)
			rng := rand.New(rand.NewPCG(1, 2))
			served := strings.HasSuffix(r.name, "/served")
			const lag = 100
			var ids []string
			if served {
				for i := range b.N + lag {
					ids = append(ids, "a-"+strconv.Itoa(i))
				}
				ev.Key = keys[0]
				e.Apply(Position{Offset: -1}, ev) // the key exists
				for i := range lag {
					a := Answer{ID: ids[i], Key: keys[0], Value: 1}
					e.PrepareAnswer(&a)
					e.Serve(a)
				}
			}
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				if served {
					a := Answer{ID: ids[i+lag], Key: keys[0], Value: 1}
					e.PrepareAnswer(&a)
					e.Serve(a)
					ev.AnswerID = ids[i]
				}
				ev.Key = keys[(uint64(i)*0x9E3779B97F4A7C15>>20)%uint64(nk)]
				s := 0.0
				for j := range ev.Features {
					v := rng.NormFloat64()
					ev.Features[j].Num = v
					s += float64(j) * v
				}
				ev.Target = s + rng.NormFloat64()
				e.Apply(Position{Offset: int64(i)}, ev)
			}
		})
	}
}

// BenchmarkPublish: one op is 100 events on keys drawn at random, then a
// publish, in an engine of 100 or 100 000 keys (rls d = 8 + mean:window=10,
// recent window 10, so that every key is full-grown after the warm-up and a
// changed key costs the same to copy in both); "floor" is the same events
// without the publish. What publishing costs is the difference: the copy of
// each changed key and its path in the trie, into storage recycled from
// versions no held copy shows (as the service publishes). It should follow
// the keys that changed (about 63 of 100 draws at 100 keys, 100 at 100 000),
// not the size of the state. "hot=100" draws the events from 100 of the
// 100 000 keys, so that what changes is as warm in the caches as at 100 keys:
// it shows what the deeper trie path costs by itself.
func BenchmarkPublish(b *testing.B) {
	for _, c := range []struct{ nk, hot int }{{100, 100}, {100_000, 100_000}, {100_000, 100}} {
		nk := c.nk
		for _, publish := range []bool{false, true} {
			name := "keys=" + strconv.Itoa(nk)
			if c.hot < nk {
				name += ",hot=" + strconv.Itoa(c.hot)
			}
			if publish {
				name += "/publish"
			} else {
				name += "/floor"
			}
			b.Run(name, func(b *testing.B) {
				e, keys, ev := keysEngine(nk, "mean:window=10", Config{Score: ScoreConfig{Recent: 10}})
				rng := rand.New(rand.NewPCG(1, 2))
				off := int64(0)
				apply := func(k string) {
					ev.Key = k
					for j := range ev.Features {
						ev.Features[j].Num = rng.NormFloat64()
					}
					ev.Target = rng.NormFloat64()
					off++
					e.Apply(Position{Offset: off}, ev)
				}
				for rep := 0; rep < 25; rep++ {
					for _, k := range keys {
						apply(k)
					}
				}
				// As the service publishes: each copy released once the
				// next replaces it, the engine reusing what no copy shows.
				var prev *Engine
				if publish {
					e.RecycleReleased()
					prev = e.Publish()
				}
				b.ReportAllocs()
				b.ResetTimer()
				for i := 0; i < b.N; i++ {
					for j := 0; j < 100; j++ {
						apply(keys[rng.IntN(c.hot)*(nk/c.hot)])
					}
					if publish {
						v := e.Publish()
						prev.Release()
						prev = v
					}
				}
			})
		}
	}
}
