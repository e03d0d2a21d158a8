package learner

import (
	"math"
	"math/rand/v2"
	"strconv"
	"testing"
)

// Benchmarks of the hot path, each beside a floor measured in the same run:
// report ratios, not absolute times (the machine is shared).

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

// BenchmarkKNNPredictFloor: a plain loop over the same window storage
// computing every squared distance and keeping the minimum.
func BenchmarkKNNPredictFloor(b *testing.B) {
	m, qs := fullKNN(b, 10000, 8, "none")
	x, d := m.w.x, m.d
	b.ReportAllocs()
	b.ResetTimer()
	var sink float64
	for i := 0; i < b.N; i++ {
		q := qs[i%len(qs)]
		best := math.Inf(1)
		for s := 0; s+d <= len(x); s += d {
			var sum float64
			for j, v := range x[s : s+d] {
				diff := v - q[j]
				sum += diff * diff
			}
			best = math.Min(best, sum)
		}
		sink += best
	}
	_ = sink
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

// BenchmarkRLSUpdateFloor: the plain covariance-form rank-one update of the
// same size (p = d+1), the arithmetic floor of RLS:
// k = Pu/(λ + uᵀPu), θ += k·e, P = (P − k·(Pu)ᵀ)/λ.
func BenchmarkRLSUpdateFloor(b *testing.B) {
	for _, d := range []int{2, 8, 32} {
		b.Run("d="+strconv.Itoa(d), func(b *testing.B) {
			p := d + 1
			P := make([]float64, p*p)
			for i := 0; i < p; i++ {
				P[i*p+i] = 1e6
			}
			theta, pu, u := make([]float64, p), make([]float64, p), make([]float64, p)
			rows := randRows(1024, d, 2)
			const lambda = 0.999
			b.ReportAllocs()
			b.ResetTimer()
			for i := 0; i < b.N; i++ {
				x := rows[i%len(rows)]
				u[0] = 1
				copy(u[1:], x)
				var den, pred float64
				for r := 0; r < p; r++ {
					var s float64
					for c := 0; c < p; c++ {
						s += P[r*p+c] * u[c]
					}
					pu[r] = s
					den += u[r] * s
					pred += u[r] * theta[r]
				}
				den += lambda
				e := x[0] - pred
				for r := 0; r < p; r++ {
					theta[r] += pu[r] / den * e
					for c := 0; c < p; c++ {
						P[r*p+c] = (P[r*p+c] - pu[r]*pu[c]/den) / lambda
					}
				}
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
