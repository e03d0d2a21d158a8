package window

import (
	"math"
	"math/big"
	"math/rand/v2"
	"testing"
)

// reference sums with math/big at a precision that holds any sum of a few
// thousand doubles exactly (2·1074 + 64 bits), then rounds once to nearest
// even: the standard library's arbitrary-precision arithmetic, independent of
// the chunked accumulator.
func reference(vs []float64, signs []bool) float64 {
	acc := new(big.Float).SetPrec(2300)
	for i, v := range vs {
		x := new(big.Float).SetPrec(2300).SetFloat64(v)
		if signs != nil && signs[i] {
			acc.Sub(acc, x)
		} else {
			acc.Add(acc, x)
		}
	}
	f, _ := acc.Float64()
	return f
}

func TestExactHandExamples(t *testing.T) {
	// Worked by hand: the large terms cancel exactly, so only the small ones
	// remain; left-to-right double addition loses them.
	cases := []struct {
		vs   []float64
		want float64
	}{
		{[]float64{1e308, 1, -1e308}, 1},
		{[]float64{1, 1e100, 1, -1e100}, 2},
		// The doubles nearest 0.1, 0.2 and 0.3 are 0x1.999999999999ap-4,
		// 0x1.999999999999ap-3 and 0x1.3333333333333p-2; in units of 2⁻⁵⁶
		// they are 7205759403792794, 14411518807585588 and
		// 21617278211378380, whose sum with the last negated is 2, so the
		// exact result is 2⁻⁵⁵ = 2.7755575615628914e-17 (left to right in
		// doubles it is 5.551115123125783e-17).
		{[]float64{0.1, 0.2, -0.3}, 0x1p-55},
		{[]float64{math.SmallestNonzeroFloat64, math.SmallestNonzeroFloat64}, 2 * math.SmallestNonzeroFloat64},
		{[]float64{math.MaxFloat64, math.MaxFloat64}, math.Inf(1)},
		{[]float64{math.MaxFloat64, math.MaxFloat64, -math.MaxFloat64}, math.MaxFloat64},
		{nil, 0},
	}
	for _, c := range cases {
		var s Exact
		for _, v := range c.vs {
			s.Add(v)
		}
		if got := s.Value(); got != c.want {
			t.Errorf("exact sum of %v = %v, want %v", c.vs, got, c.want)
		}
		if ref := reference(c.vs, nil); ref != c.want {
			t.Errorf("the reference itself gives %v for %v", ref, c.vs)
		}
	}
}

func TestExactMatchesBigFloat(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 9))
	for trial := 0; trial < 200; trial++ {
		n := 1 + rng.IntN(5000) // past the carry interval
		vs := make([]float64, n)
		signs := make([]bool, n)
		for i := range vs {
			switch rng.IntN(4) {
			case 0:
				vs[i] = rng.NormFloat64()
			case 1:
				vs[i] = math.Ldexp(rng.Float64(), rng.IntN(2098)-1074) // any magnitude, subnormals included
			case 2:
				vs[i] = float64(rng.IntN(1000)) * 0.1
			default:
				vs[i] = -vs[max(0, i-1-rng.IntN(3))] // cancellation
			}
			signs[i] = rng.IntN(3) == 0
		}
		var s Exact
		for i, v := range vs {
			if signs[i] {
				s.Sub(v)
			} else {
				s.Add(v)
			}
		}
		if got, want := s.Value(), reference(vs, signs); got != want && !(math.IsNaN(got) && math.IsNaN(want)) {
			t.Fatalf("trial %d (%d terms): exact sum %v, math/big %v", trial, n, got, want)
		}
	}
}

// The order of additions and removals does not change the sum: what the
// engine's running totals rely on.
func TestExactOrderFree(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	vs := make([]float64, 3000)
	for i := range vs {
		vs[i] = rng.NormFloat64() * math.Pow(10, float64(rng.IntN(30)-15))
	}
	var a, b, c, d Exact
	for _, v := range vs {
		a.Add(v)
	}
	for i := len(vs) - 1; i >= 0; i-- {
		b.Add(vs[i])
	}
	for i, v := range vs { // add everything, then take every other back out and in again
		c.Add(v)
		if i%2 == 0 {
			c.Sub(v)
		}
	}
	for i := 0; i < len(vs); i += 2 {
		c.Add(vs[i])
	}
	d.AddExact(&a)
	if a.Value() != b.Value() || a.Value() != c.Value() || a.Value() != d.Value() {
		t.Errorf("sums differ by order: %v %v %v %v", a.Value(), b.Value(), c.Value(), d.Value())
	}
}

func TestExactSpecials(t *testing.T) {
	var s Exact
	s.Add(1.5)
	s.Add(math.Inf(1))
	if v := s.Value(); !math.IsInf(v, 1) {
		t.Errorf("with +Inf: %v", v)
	}
	s.Add(math.Inf(-1))
	if v := s.Value(); !math.IsNaN(v) {
		t.Errorf("with both infinities: %v, want NaN", v)
	}
	s.Sub(math.Inf(1))
	s.Sub(math.Inf(-1))
	if v := s.Value(); v != 1.5 {
		t.Errorf("after taking the infinities out: %v, want 1.5", v)
	}
	s.Add(math.NaN())
	s.Sub(math.NaN())
	if v := s.Value(); v != 1.5 {
		t.Errorf("after taking a NaN out: %v, want 1.5", v)
	}
	s.Sub(3)
	if v := s.Value(); v != -1.5 {
		t.Errorf("negative sum: %v, want -1.5", v)
	}
}

func BenchmarkExactAdd(b *testing.B) {
	b.ReportAllocs()
	var s Exact
	v := 0.1
	for i := 0; i < b.N; i++ {
		s.Add(v)
		s.Sub(v * 0.5)
	}
}

func BenchmarkExactValue(b *testing.B) {
	b.ReportAllocs()
	var s Exact
	for i := 0; i < 1000; i++ {
		s.Add(float64(i) * 0.37)
	}
	for i := 0; i < b.N; i++ {
		s.Value()
	}
}
