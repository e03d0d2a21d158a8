package learner

import (
	"math"
	"math/rand/v2"
	"sort"
	"strconv"
	"testing"
)

// TestKNNWorkedExample: five 1-D points, computed by hand (scale=none).
func TestKNNWorkedExample(t *testing.T) {
	type pt struct{ x, y float64 }
	spread := []pt{{1, 10}, {2, 20}, {4, 40}, {5, 50}, {3, 30}}
	ties := []pt{{0, 1}, {2, 2}, {4, 3}, {2, 4}, {0, 5}}
	tests := []struct {
		name string
		spec string
		pts  []pt
		q    float64
		want float64
		why  string
	}{
		{"two nearest", "knn:k=2,scale=none,window=all", spread, 3.2, 35,
			"distances 2.2 1.2 0.8 1.8 0.2: nearest x=3 (30) and x=4 (40); (30+40)/2"},
		{"inverse", "knn:k=2,scale=none,weight=inverse,window=all", spread, 3.2, 32,
			"weights 1/0.2=5 and 1/0.8=1.25: (5·30+1.25·40)/6.25 = 200/6.25"},
		{"fewer than k", "knn:k=10,scale=none,window=all", spread, 0, 30,
			"all five: (10+20+40+50+30)/5"},
		{"tie k=1", "knn:k=1,scale=none,window=all", ties, 1, 5,
			"four points at distance 1; the most recent is (0, 5)"},
		{"tie k=2", "knn:k=2,scale=none,window=all", ties, 1, 4.5,
			"most recent two at distance 1: y=5 and y=4"},
		{"tie k=3", "knn:k=3,scale=none,window=all", ties, 1, 11.0 / 3,
			"y=5, 4, 2 (the third most recent at distance 1)"},
		{"zero distance inverse", "knn:k=3,scale=none,weight=inverse,window=all", ties, 2, 3,
			"x=2 twice at distance 0 (y=2, y=4): their mean"},
		{"zero distance equal", "knn:k=3,scale=none,window=all", ties, 2, 11.0 / 3,
			"y=4 and y=2 at 0, then the most recent at 2, y=5"},
		{"count window", "knn:k=2,scale=none,window=3", ties, 1, 4.5,
			"window holds (4,3),(2,4),(0,5): distances 3,1,1"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			s, err := ParseSpec(tc.spec)
			if err != nil {
				t.Fatal(err)
			}
			m := New(&s, 1)
			for _, p := range tc.pts {
				m.Learn([]float64{p.x}, p.y, 0)
			}
			got, ok := m.Predict([]float64{tc.q})
			if !ok || math.Abs(got-tc.want) > 1e-12 {
				t.Errorf("predict(%v) = %v, %v; want %v (%s)", tc.q, got, ok, tc.want, tc.why)
			}
		})
	}
}

// refEvent is one event kept by the brute-force reference.
type refEvent struct {
	x []float64
	y float64
	t int64
}

// refKNN is k-NN written plainly from DESIGN.md: take the window's contents,
// standardise by their population mean and deviation (two passes) when
// zscore, sort by distance then by recency, and average the first k.
func refKNN(win []refEvent, q []float64, k int, inverse, zscore bool) float64 {
	d := len(q)
	inv := make([]float64, d)
	for j := range inv {
		inv[j] = 1
		if zscore {
			var mean, ss float64
			for _, e := range win {
				mean += e.x[j]
			}
			mean /= float64(len(win))
			for _, e := range win {
				ss += (e.x[j] - mean) * (e.x[j] - mean)
			}
			if v := ss / float64(len(win)); v > 0 {
				inv[j] = 1 / v
			}
		}
	}
	type cand struct {
		d2  float64
		age int
		y   float64
	}
	cs := make([]cand, len(win))
	for i, e := range win {
		var s float64
		for j := range q {
			diff := e.x[j] - q[j]
			if zscore {
				s += diff * diff * inv[j]
			} else {
				s += diff * diff
			}
		}
		cs[i] = cand{s, len(win) - i, e.y}
	}
	sort.Slice(cs, func(a, b int) bool {
		if cs[a].d2 != cs[b].d2 {
			return cs[a].d2 < cs[b].d2
		}
		return cs[a].age < cs[b].age
	})
	cs = cs[:min(k, len(cs))]
	if inverse {
		if cs[0].d2 == 0 {
			var s float64
			n := 0
			for _, c := range cs {
				if c.d2 == 0 {
					s += c.y
					n++
				}
			}
			return s / float64(n)
		}
		var num, den float64
		for _, c := range cs {
			w := 1 / math.Sqrt(c.d2)
			num += w * c.y
			den += w
		}
		return num / den
	}
	var s float64
	for _, c := range cs {
		s += c.y
	}
	return s / float64(len(cs))
}

func TestKNNMatchesBruteForce(t *testing.T) {
	const minute = int64(60e9)
	for _, k := range []int{1, 3, 10} {
		for _, win := range []string{"50", "2h", "all"} {
			for _, weight := range []string{"equal", "inverse"} {
				for _, scale := range []string{"none", "zscore"} {
					spec := "knn:k=" + strconv.Itoa(k) + ",window=" + win + ",weight=" + weight + ",scale=" + scale + ",max=400"
					t.Run(spec, func(t *testing.T) {
						s, err := ParseSpec(spec)
						if err != nil {
							t.Fatal(err)
						}
						const d = 3
						m := New(&s, d)
						rng := rand.New(rand.NewPCG(uint64(k), 99))
						var hist []refEvent
						tm := int64(0)
						for i := 0; i < 800; i++ {
							tm += minute * int64(1+rng.IntN(5))
							x := make([]float64, d)
							for j := range x {
								if scale == "none" {
									x[j] = float64(rng.IntN(5)) // integer grid: many exact ties
								} else {
									x[j] = rng.NormFloat64() * math.Pow(10, float64(j))
								}
							}
							y := x[0] + 2*x[1] + rng.NormFloat64()
							// The reference window, from DESIGN.md's definitions alone.
							var w []refEvent
							for _, e := range hist {
								switch {
								case win == "50":
								case win == "2h" && e.t < tm-120*minute:
									continue
								}
								w = append(w, e)
							}
							if win == "50" && len(w) > 50 {
								w = w[len(w)-50:]
							}
							if len(w) > 400 { // the memory cap max=400
								w = w[len(w)-400:]
							}
							m.Advance(tm)
							got, ok := m.Predict(x)
							if ok != (len(w) > 0) {
								t.Fatalf("event %d: ready %v with %d in the reference window", i, ok, len(w))
							}
							if ok {
								want := refKNN(w, x, k, weight == "inverse", scale == "zscore")
								tol := 0.0 // scale=none: the same arithmetic in the same order, bit for bit
								if scale == "zscore" {
									tol = 1e-9 // running moments against two passes
								}
								if math.Abs(got-want) > tol*math.Max(1, math.Abs(want)) {
									t.Fatalf("event %d: predict %.17g, reference %.17g", i, got, want)
								}
							}
							m.Learn(x, y, tm)
							hist = append(hist, refEvent{x, y, tm})
						}
					})
				}
			}
		}
	}
}
