package window

import "math"

// Moments keeps the count, mean and sum of squared deviations of a multiset
// of values, with O(1) Add and Remove, so that a sliding window's mean and
// variance follow it exactly as values enter and leave.
//
// Add is Welford's update (Welford 1962, Technometrics 4(3):419–420):
//
//	n ← n+1,  δ = x − mean,  mean ← mean + δ/n,  M2 ← M2 + δ·(x − mean)
//
// Remove runs the same recursion backwards. Merge combines two sets by the
// pairwise formula of Chan, Golub & LeVeque (1983, The American Statistician
// 37(3):242–247):
//
//	δ = mean_b − mean_a,  M2 = M2_a + M2_b + δ²·n_a·n_b/n
//
// Removing values accumulates rounding slowly over very long streams; owners
// of sliding windows rebuild their Moments from the window's contents every
// window length (see the learner package), which bounds the error to that of
// one pass.
//
// The zero Moments is empty and ready to use.
type Moments struct {
	n    int64
	mean float64
	m2   float64
}

// Add inserts x.
func (m *Moments) Add(x float64) {
	m.n++
	d := x - m.mean
	m.mean += d / float64(m.n)
	m.m2 += d * (x - m.mean)
}

// Remove deletes one occurrence of x, which must have been added. It panics if
// the set is empty.
func (m *Moments) Remove(x float64) {
	if m.n == 0 {
		panic(errNoValue)
	}
	if m.n == 1 {
		*m = Moments{}
		return
	}
	nOld := float64(m.n)
	m.n--
	meanNew := (nOld*m.mean - x) / float64(m.n)
	m.m2 -= (x - m.mean) * (x - meanNew)
	if m.m2 < 0 {
		m.m2 = 0 // rounding only: a sum of squares is never negative
	}
	m.mean = meanNew
}

// Merge adds every value of o into m (Chan et al.).
func (m *Moments) Merge(o Moments) {
	if o.n == 0 {
		return
	}
	if m.n == 0 {
		*m = o
		return
	}
	n := m.n + o.n
	d := o.mean - m.mean
	m.m2 += o.m2 + d*d*float64(m.n)*float64(o.n)/float64(n)
	m.mean += d * float64(o.n) / float64(n)
	m.n = n
}

// Reset empties the set.
func (m *Moments) Reset() { *m = Moments{} }

// N returns the number of values.
func (m *Moments) N() int64 { return m.n }

// Mean returns the mean, or 0 for an empty set.
func (m *Moments) Mean() float64 { return m.mean }

// M2 returns the sum of squared deviations from the mean.
func (m *Moments) M2() float64 { return m.m2 }

// Variance returns the unbiased sample variance M2/(n−1), or 0 when n < 2.
func (m *Moments) Variance() float64 {
	if m.n < 2 {
		return 0
	}
	return m.m2 / float64(m.n-1)
}

// PopVariance returns the population variance M2/n, or 0 for an empty set.
func (m *Moments) PopVariance() float64 {
	if m.n == 0 {
		return 0
	}
	return m.m2 / float64(m.n)
}

// Std returns the square root of Variance.
func (m *Moments) Std() float64 { return math.Sqrt(m.Variance()) }

// State returns the raw fields, for encoders; SetState is its inverse.
func (m *Moments) State() (n int64, mean, m2 float64) { return m.n, m.mean, m.m2 }

// SetState restores fields returned by State.
func (m *Moments) SetState(n int64, mean, m2 float64) { m.n, m.mean, m.m2 = n, mean, m2 }
