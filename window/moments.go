package window

import "math"

// Moments keeps the count, mean and sum of squared deviations M2 of a
// multiset of values, with O(1) Add and Remove, so that a sliding window's
// mean and variance follow it as values enter and leave.
//
// It holds shifted sums about a value K of the set (Chan, Golub & LeVeque
// 1983, "Algorithms for computing the sample variance", The American
// Statistician 37(3):242–247, the shifted-data algorithm):
//
//	S1 = Σ (x − K),  S2 = Σ (x − K)²,  mean = K + S1/n,  M2 = S2 − S1²/n,
//
// each a compensated Sum, so that removing a value subtracts exactly what
// adding it added. The first value added to an empty Moments becomes K: a
// feature that is constant in the window then has S1 = S2 = 0 exactly and
// variance exactly 0 (a running variance that had seen other values leave
// would otherwise keep ~1e-34 of rounding, which a z-score turns into a
// scale of 1e17).
//
// Imprecise reports when the rounding bound of the mean or of M2 exceeds
// RelTol of their scale: after a huge value leaves, or once K lies many
// standard deviations from the mean (S2 − S1²/n then cancels). The owner of
// the window then calls Rebuild with its contents, which takes as K the value
// nearest to the window's mean, so that every figure is again as accurate as
// a fresh two-pass computation over the window.
//
// The zero Moments is empty and ready to use.
type Moments struct {
	n      int64
	shift  float64
	s1, s2 Sum
}

// RelTol is the relative rounding bound past which Imprecise asks for a
// rebuild. Figures are then within about RelTol of a fresh two-pass
// computation; the long-stream test in learner holds them to 1e-9.
const RelTol = 1e-11

// Add inserts x.
func (m *Moments) Add(x float64) {
	if m.n == 0 {
		*m = Moments{shift: x}
	}
	m.add(x)
}

func (m *Moments) add(x float64) {
	m.n++
	d := x - m.shift
	m.s1.Add(d)
	m.s2.Add(d * d)
}

// Remove deletes one occurrence of x, which must have been added. It panics if
// the set is empty.
func (m *Moments) Remove(x float64) {
	if m.n == 0 {
		panic(errNoValue)
	}
	m.n--
	if m.n == 0 {
		*m = Moments{}
		return
	}
	d := x - m.shift
	m.s1.Sub(d)
	m.s2.Sub(d * d)
}

// Rebuild replaces the contents by the n values at(0), …, at(n−1), taking as
// K the value nearest to their mean. Cost O(n), three passes.
func (m *Moments) Rebuild(n int, at func(i int) float64) {
	*m = Moments{}
	if n == 0 {
		return
	}
	var s Sum
	for i := 0; i < n; i++ {
		s.Add(at(i))
	}
	mean := s.Value() / float64(n)
	k, best := at(0), math.Inf(1)
	for i := 0; i < n; i++ {
		if d := math.Abs(at(i) - mean); d < best {
			k, best = at(i), d
		}
	}
	m.shift = k
	for i := 0; i < n; i++ {
		m.add(at(i))
	}
}

// Merge adds every value of o into m (Chan, Golub & LeVeque's pairwise
// formula: δ = mean_o − mean_m, M2 = M2_m + M2_o + δ²·n_m·n_o/n). The merged
// set keeps its mean as K.
func (m *Moments) Merge(o Moments) {
	if o.n == 0 {
		return
	}
	if m.n == 0 {
		*m = o
		return
	}
	n := m.n + o.n
	d := o.Mean() - m.Mean()
	m2 := m.M2() + o.M2() + d*d*float64(m.n)*float64(o.n)/float64(n)
	mean := m.Mean() + d*float64(o.n)/float64(n)
	bound := m.s2.bound + o.s2.bound + 4*unitRoundoff*m2
	*m = Moments{n: n, shift: mean}
	m.s2 = Sum{hi: m2, bound: bound}
}

// Imprecise reports whether rounding may have moved the mean by more than
// RelTol of (|mean| + standard deviation), or M2 by more than RelTol of M2;
// the owner should then Rebuild. It is false for an exact zero variance.
// Cost: about 20 flops and one division, no square root.
func (m *Moments) Imprecise() bool {
	if m.n == 0 {
		return false
	}
	n := float64(m.n)
	inv := 1 / n
	s1, s2 := m.s1.Value(), m.s2.Value()
	q := s1 * s1 * inv
	m2 := s2 - q
	if m2 < 0 {
		m2 = 0
	}
	// M2's error: the sums' bounds, the rounding of x − K and (x − K)²
	// (about 3u·S2), and of the final subtraction. The u·Σ|x − K| part of
	// the mean's error is covered here too: it exceeds RelTol of the mean's
	// scale only when K lies thousands of deviations from the mean, where
	// 4u·S2 has long exceeded RelTol·M2.
	e2 := m.s2.bound + 2*math.Abs(s1)*inv*m.s1.bound + 4*unitRoundoff*(s2+q)
	if e2 > RelTol*m2 {
		return true
	}
	if m.s1.bound == 0 {
		return false
	}
	// The mean's error S1.bound/n against RelTol·(|mean| + √(M2/n)), in a
	// form without a square root: b > tol·n·|mean| + tol·√(n·M2).
	r := m.s1.bound - RelTol*n*math.Abs(m.shift+s1*inv)
	return r > 0 && r*r > RelTol*RelTol*n*m2
}

// Reset empties the set.
func (m *Moments) Reset() { *m = Moments{} }

// N returns the number of values.
func (m *Moments) N() int64 { return m.n }

// Mean returns the mean, or 0 for an empty set.
func (m *Moments) Mean() float64 {
	if m.n == 0 {
		return 0
	}
	return m.shift + m.s1.Value()/float64(m.n)
}

// M2 returns the sum of squared deviations from the mean (never negative).
func (m *Moments) M2() float64 {
	if m.n == 0 {
		return 0
	}
	s1 := m.s1.Value()
	return math.Max(m.s2.Value()-s1*s1/float64(m.n), 0)
}

// Variance returns the unbiased sample variance M2/(n−1), or 0 when n < 2.
func (m *Moments) Variance() float64 {
	if m.n < 2 {
		return 0
	}
	return m.M2() / float64(m.n-1)
}

// PopVariance returns the population variance M2/n, or 0 for an empty set.
func (m *Moments) PopVariance() float64 {
	if m.n == 0 {
		return 0
	}
	return m.M2() / float64(m.n)
}

// Std returns the square root of Variance.
func (m *Moments) Std() float64 { return math.Sqrt(m.Variance()) }

// MomentsState is the exported form of a Moments, for encoders.
type MomentsState struct {
	N      int64
	Shift  float64
	S1, S2 SumState
}

// State returns the fields of m; SetState is its inverse.
func (m *Moments) State() MomentsState {
	return MomentsState{N: m.n, Shift: m.shift, S1: m.s1.State(), S2: m.s2.State()}
}

// SetState restores a state returned by State.
func (m *Moments) SetState(st MomentsState) {
	m.n, m.shift = st.N, st.Shift
	m.s1.SetState(st.S1)
	m.s2.SetState(st.S2)
}
