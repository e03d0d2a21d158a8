package learner

import "math"

// Defaults of ADWIN.
const (
	DefaultADWINDelta   = 0.002 // δ: the confidence of a cut
	DefaultADWINBuckets = 5     // M: buckets kept per level of the histogram
	adwinMinSide        = 5     // elements each side of a cut needs at least
)

// ADWIN is the adaptive windowing drift detector of Bifet & Gavaldà (2007),
// "Learning from Time-Changing Data with Adaptive Windowing", SIAM SDM, in
// its ADWIN2 form: a window of the most recent values kept as an
// exponential histogram (Datar, Gionis, Indyk & Motwani 2002) — buckets of
// 2^i values each, at most M of each size, the two oldest of a size merged
// when an (M+1)-th arrives — so that it holds O(M·log(W/M)) buckets for a
// window of W values. After each value it looks at every split of the
// window into an older part W₀ and a newer part W₁ at a bucket boundary and
// drops the oldest bucket while, for some split,
//
//	|μ̂₀ − μ̂₁| ≥ ε_cut = √((2/m)·σ̂²_W·ln(2/δ')) + (2/(3m))·ln(2/δ'),
//	m = 1/(1/n₀ + 1/n₁),  δ' = δ/n,
//
// the paper's cut for values of variance σ̂²_W (its Section 4), with n the
// window's length. The paper bounds the chance of any cut on a stationary
// stream by δ, and shows that a change of the mean by more than 2ε_cut is
// cut. It alarms when a cut happens and the newer part's mean is the higher:
// the engine watches absolute errors, and only their rise is a drift.
//
// Not safe for concurrent use.
type ADWIN struct {
	delta   float64
	m       int
	levels  [][]adwinBucket // levels[i] holds buckets of 2^i values, oldest first
	n       int64           // values in the window
	sum     float64
	m2      float64 // Σ (x − mean)² over the window
	alarms  int64
	since   int32 // values since the last alarm, saturating
	alarmed bool
}

// adwinBucket is the count-implied summary of 2^level values: their sum
// and sum of squared deviations from their mean.
type adwinBucket struct{ sum, m2 float64 }

// NewADWIN returns a detector with confidence delta (0 < δ < 1) and m
// buckets per level (≥ 2); zero values take the defaults.
func NewADWIN(delta float64, m int) *ADWIN {
	if delta <= 0 || delta >= 1 {
		delta = DefaultADWINDelta
	}
	if m < 2 {
		m = DefaultADWINBuckets
	}
	return &ADWIN{delta: delta, m: m, since: math.MaxInt32}
}

// Len returns the window's length; Buckets the buckets that hold it.
func (a *ADWIN) Len() int64 { return a.n }

// Buckets returns how many buckets hold the window.
func (a *ADWIN) Buckets() int {
	n := 0
	for _, l := range a.levels {
		n += len(l)
	}
	return n
}

// Mean returns the window's mean (0 when empty).
func (a *ADWIN) Mean() float64 {
	if a.n == 0 {
		return 0
	}
	return a.sum / float64(a.n)
}

// Alarms returns the number of alarms raised.
func (a *ADWIN) Alarms() int64 { return a.alarms }

// Add feeds one value and reports whether it raised an alarm (a cut after
// which the newer part's mean was the higher).
func (a *ADWIN) Add(x float64) bool {
	if a.since < math.MaxInt32 {
		a.since++
	}
	a.insert(x)
	rose := false
	for {
		cut, up := a.cut()
		if !cut {
			break
		}
		rose = rose || up
		a.dropOldest()
	}
	if rose {
		a.alarms++
		a.since, a.alarmed = 0, true
	}
	return rose
}

// insert adds x as a bucket of one and merges buckets up the levels.
func (a *ADWIN) insert(x float64) {
	if a.n > 0 {
		mean := a.sum / float64(a.n)
		a.m2 += float64(a.n) / float64(a.n+1) * (x - mean) * (x - mean)
	}
	a.n++
	a.sum += x
	if len(a.levels) == 0 {
		a.levels = append(a.levels, make([]adwinBucket, 0, a.m+1))
	}
	a.levels[0] = append(a.levels[0], adwinBucket{sum: x})
	for i := 0; i < len(a.levels) && len(a.levels[i]) > a.m; i++ {
		b0, b1 := a.levels[i][0], a.levels[i][1]
		size := float64(int64(1) << i)
		d := b0.sum/size - b1.sum/size
		merged := adwinBucket{sum: b0.sum + b1.sum, m2: b0.m2 + b1.m2 + size/2*d*d}
		a.levels[i] = append(a.levels[i][:0], a.levels[i][2:]...)
		if i+1 == len(a.levels) {
			a.levels = append(a.levels, make([]adwinBucket, 0, a.m+1))
		}
		a.levels[i+1] = append(a.levels[i+1], merged)
	}
}

// cut reports whether some split of the window passes ε_cut, and whether
// the newer part's mean is then the higher.
func (a *ADWIN) cut() (bool, bool) {
	if a.n < 2*adwinMinSide {
		return false, false
	}
	n := float64(a.n)
	variance := a.m2 / n
	lnTerm := math.Log(2 * n / a.delta) // ln(2/δ'), δ' = δ/n
	var n0, s0 float64
	// Oldest first: the highest level holds the oldest buckets.
	for i := len(a.levels) - 1; i >= 0; i-- {
		size := float64(int64(1) << i)
		for _, b := range a.levels[i] {
			n0 += size
			s0 += b.sum
			n1 := n - n0
			if n0 < adwinMinSide || n1 < adwinMinSide {
				continue
			}
			m := 1 / (1/n0 + 1/n1)
			eps := math.Sqrt(2/m*variance*lnTerm) + 2/(3*m)*lnTerm
			mu0, mu1 := s0/n0, (a.sum-s0)/n1
			if math.Abs(mu0-mu1) >= eps {
				return true, mu1 > mu0
			}
		}
	}
	return false, false
}

// dropOldest removes the window's oldest bucket.
func (a *ADWIN) dropOldest() {
	top := len(a.levels) - 1
	b := a.levels[top][0]
	a.levels[top] = append(a.levels[top][:0], a.levels[top][1:]...)
	if len(a.levels[top]) == 0 {
		a.levels = a.levels[:top]
	}
	size := float64(int64(1) << top)
	// Remove b's values from the window's moments (the reverse of a merge).
	n, nb := float64(a.n), size
	meanB := b.sum / nb
	rest := n - nb
	if rest <= 0 {
		a.n, a.sum, a.m2 = 0, 0, 0
		return
	}
	meanRest := (a.sum - b.sum) / rest
	a.m2 -= b.m2 + nb*rest/n*(meanB-meanRest)*(meanB-meanRest)
	a.m2 = math.Max(a.m2, 0)
	a.n -= int64(size)
	a.sum -= b.sum
}

// State returns drift within the warm-up of the last alarm (as
// PageHinkley: minEvents), and stable otherwise.
func (a *ADWIN) State(minEvents int) DriftState {
	if a.alarmed && int64(a.since) <= int64(minEvents) {
		return Drift
	}
	return Stable
}

// clone returns a copy that shares nothing with a.
func (a *ADWIN) clone() *ADWIN {
	c := *a
	c.levels = make([][]adwinBucket, len(a.levels))
	for i, l := range a.levels {
		c.levels[i] = append(make([]adwinBucket, 0, a.m+1), l...)
	}
	return &c
}

func (a *ADWIN) encode(w *encoder) {
	w.i64(a.n)
	w.f64(a.sum)
	w.f64(a.m2)
	w.i64(a.alarms)
	w.i64(int64(a.since))
	w.bool(a.alarmed)
	w.int(len(a.levels))
	for _, l := range a.levels {
		w.int(len(l))
		for _, b := range l {
			w.f64(b.sum)
			w.f64(b.m2)
		}
	}
}

func (a *ADWIN) decode(r *decoder) {
	a.n, a.sum, a.m2, a.alarms = r.i64(), r.f64(), r.f64(), r.i64()
	a.since = int32(min(max(r.i64(), 0), math.MaxInt32))
	a.alarmed = r.bool()
	nl := r.count(64, 4)
	a.levels = make([][]adwinBucket, nl)
	var held int64
	for i := range a.levels {
		nb := r.count(a.m+1, 16)
		a.levels[i] = make([]adwinBucket, nb, a.m+1)
		for j := range a.levels[i] {
			a.levels[i][j] = adwinBucket{sum: r.f64(), m2: r.f64()}
		}
		held += int64(nb) << i
	}
	if r.err == nil && held != a.n {
		r.fail("an ADWIN window whose buckets do not hold its length")
	}
}
