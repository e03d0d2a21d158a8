package learner

import "unsafe"

// SlidingRLS is the exact least-squares fit over the events in a sliding
// window (the last Count events, or those within Span of event time of the
// newest):
//
//	θ = argmin Σ_{i ∈ window} (yᵢ − uᵢᵀθ)²,  u = [1, x] (see expansion),
//
// with no prior. It keeps the square-root information form (sqrtInfo) of the
// window: an entering row is added with Givens rotations, a leaving row is
// removed with the LINPACK downdate dchdd. Downdating is the step that can
// lose accuracy, so the factor is refactorised from the window's rows
//   - every window-length of evictions (cost O(n·p²) every n events, O(p²)
//     amortised), which bounds the error to that of a fresh factorisation
//     however long the stream runs, and
//   - at once whenever a downdate reports that the downdated matrix would not
//     be positive definite.
//
// A time window holds the events with t ≥ newest − Span (see rows); an
// event already older than that on arrival is predicted and scored but not
// stored (Late counts it), and Trained does not count it.
//
// Cost per event O(p²) amortised; memory the window's rows, n·p floats.
// Ready once the window holds at least p events (and it has trained on p).
// Dependent columns get coefficient 0, as for RLS.
type SlidingRLS struct {
	cfg     SlidingConfig
	ex      expansion
	w       rows // rows of regressors u, not raw features
	qr      sqrtInfo
	theta   []float64
	trained int64
	late    int64 // events older than the time window on arrival, not stored
	evicted int
	stale   bool // a downdate failed: refactorise before solving
	rankDef int
	refacts int64
}

var _ Learner = (*SlidingRLS)(nil)

func newSliding(cfg SlidingConfig, d int) *SlidingRLS { return newSlidingShared(cfg, d, new(*scratch)) }

// newSlidingShared is newSliding with working space shared through *sp (made when nil).
func newSlidingShared(cfg SlidingConfig, d int, sp **scratch) *SlidingRLS {
	ex := expansion{d: d, intercept: !cfg.NoIntercept, degree: cfg.Degree}
	p := ex.p()
	qr, theta := newSqrtInfo(p, useScratch(sp, p), p)
	return &SlidingRLS{cfg: cfg, ex: ex, w: newRows(p, cfg.Window, cfg.Max), qr: qr, theta: theta, rankDef: p}
}

// cloneInto implements Learner.
func (m *SlidingRLS) cloneInto(dst Learner) Learner {
	d, ok := dst.(*SlidingRLS)
	if !ok || len(d.qr.r) != len(m.qr.r) || len(d.qr.z) != len(m.qr.z) || len(d.theta) != len(m.theta) {
		return m.clone()
	}
	r, z, th, w := d.qr.r, d.qr.z, d.theta, d.w
	*d = *m
	copy(r, m.qr.r)
	copy(z, m.qr.z)
	copy(th, m.theta)
	d.qr.r, d.qr.z, d.theta = r, z, th
	d.w = m.w.cloneInto(w)
	return d
}

// rebind implements Learner.
func (m *SlidingRLS) rebind(sp **scratch) { m.qr.s = useScratch(sp, m.qr.p) }

// held implements Learner.
func (m *SlidingRLS) held() int64 {
	return int64(unsafe.Sizeof(*m)) + 8*int64(len(m.qr.r)+len(m.qr.z)+len(m.theta)) + m.w.held()
}

// touch implements Learner.
func (m *SlidingRLS) touch() float64 {
	return m.qr.r[0] + m.qr.r[len(m.qr.r)-1] + m.theta[len(m.theta)-1] + m.w.touch()
}

// clone implements Learner.
func (m *SlidingRLS) clone() Learner {
	c := *m
	c.w = m.w.clone()
	c.qr, c.theta = m.qr.clone(len(m.theta))
	copy(c.theta, m.theta)
	return &c
}

// Advance implements Learner.
func (m *SlidingRLS) Advance(t int64) {
	m.w.advance(t)
	changed := false
	for s, ok := m.w.popExpired(); ok; s, ok = m.w.popExpired() {
		m.drop(s)
		changed = true
	}
	if changed {
		m.refresh()
	}
}

// Trained implements Learner.
func (m *SlidingRLS) Trained() int64 { return m.trained }

// Late returns the number of events that were older than the time window's
// bound on arrival and so were not stored.
func (m *SlidingRLS) Late() int64 { return m.late }

// Refactorisations returns how many times the factor was rebuilt from the window.
func (m *SlidingRLS) Refactorisations() int64 { return m.refacts }

// Predict implements Learner.
func (m *SlidingRLS) Predict(x []float64) (float64, bool) {
	m.ex.apply(m.qr.s.u, x)
	p := len(m.theta)
	if m.trained < int64(p) || m.w.len() < p {
		return 0, false
	}
	return dot(m.qr.s.u, m.theta), true
}

// predictShared implements Learner: the same with u of its own.
func (m *SlidingRLS) predictShared(x []float64) (float64, bool) {
	u := make([]float64, len(m.theta))
	m.ex.apply(u, x)
	p := len(m.theta)
	if m.trained < int64(p) || m.w.len() < p {
		return 0, false
	}
	return dot(u, m.theta), true
}

// Learn implements Learner.
func (m *SlidingRLS) Learn(x []float64, y float64, t int64) {
	m.ex.apply(m.qr.s.u, x)
	m.w.advance(t)
	for s, ok := m.w.popExpired(); ok; s, ok = m.w.popExpired() {
		m.drop(s)
	}
	if m.w.late(t) {
		m.late++
		m.refresh()
		return
	}
	if s, ok := m.w.makeRoom(); ok {
		m.drop(s)
	}
	m.w.push(m.qr.s.u, y, t)
	if !m.stale {
		m.qr.add(m.qr.s.u, y)
	}
	m.trained++
	m.refresh()
}

// drop removes the row in slot s, just popped from the window, from the factor.
func (m *SlidingRLS) drop(s int) {
	m.evicted++
	if !m.stale && !m.qr.remove(m.w.row(s), m.w.y[s]) {
		m.stale = true
	}
}

// refresh refactorises when due and solves for θ.
func (m *SlidingRLS) refresh() {
	if m.stale || m.evicted >= max(m.w.idx.Size(), 1) {
		m.refactor()
	}
	m.rankDef = m.qr.solve(m.theta)
}

func (m *SlidingRLS) refactor() {
	m.qr.reset(0)
	for i := 0; i < m.w.len(); i++ {
		s := m.w.idx.Slot(i)
		m.qr.add(m.w.row(s), m.w.y[s])
	}
	m.evicted, m.stale = 0, false
	m.refacts++
}

// Deficient returns the number of regressors found dependent at the last solve.
func (m *SlidingRLS) Deficient() int { return m.rankDef }

// Coefficients implements the Coefficients interface.
func (m *SlidingRLS) Coefficients(dst []float64) []float64 {
	return append(dst[:0], m.theta...)
}

func (m *SlidingRLS) encode(w *encoder) {
	w.i64(m.trained)
	w.i64(m.late)
	w.int(m.evicted)
	w.i64(m.refacts)
	m.w.encode(w)
	m.qr.encode(w)
}

func (m *SlidingRLS) decode(r *decoder) error {
	m.trained = r.i64()
	if r.ver >= 5 {
		m.late = r.i64()
	}
	m.evicted = r.int()
	m.refacts = r.i64()
	m.w.decode(r)
	m.qr.decode(r)
	m.stale = false
	m.rankDef = m.qr.solve(m.theta)
	return r.err
}
