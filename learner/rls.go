package learner

import (
	"math"
	"time"
	"unsafe"
)

// RLS is exponentially weighted recursive least squares on the regressors
// u = [1, x] (see expansion; intercept and degree 2 optional). After n events
// with forgetting factors λ its coefficients are the batch solution
//
//	θₙ = ( Σᵢ λ^(n−i) uᵢuᵢᵀ + λⁿ/p0 · I )⁻¹ Σᵢ λ^(n−i) uᵢyᵢ
//
// (Haykin, Adaptive Filter Theory, 4th ed., ch. 9; Ljung & Söderström,
// Theory and Practice of Recursive Identification, 1983), with P(0) = p0·I,
// p0 = +Inf meaning no prior. λ is fixed (forget, in (0, 1]; 1 is cumulative)
// or, with half_life h, λ = 0.5^(Δt/h) where Δt is how far the event moves
// the newest event time seen (λ = 1 for the first event and for an event at
// or before the newest time). Forgetting thus follows the advance of event
// time only, never its arrival order: with Tᵢ the newest time seen once
// event i has arrived, the weight of event i after n events is
// 0.5^((Tₙ − Tᵢ)/h) and the prior's is 0.5^((Tₙ − T₁)/h); an event that
// arrives late is weighted as if it had come at Tᵢ, and no interval of time
// is ever decayed twice.
//
// The textbook recursion (gain k = Pu/(λ + uᵀPu), θ ← θ + k(y − uᵀθ),
// P ← (P − kuᵀP)/λ) propagates P = A⁻¹ and loses every digit on
// ill-conditioned data. RLS instead keeps the square-root information form
// (sqrtInfo): each event multiplies R and z by √λ and adds the row (u, y)
// with Givens rotations, then solves Rθ = z. The same recursion, stable
// (Bierman, Factorization Methods for Discrete Sequential Estimation, 1977).
// The factor √λ is not applied to R and z: it is carried as one scalar c
// (R and z stored are the true ones divided by c), and the row enters as
// (u, y)/c, which is the same rotation problem scaled by 1/c; θ solves
// Rθ = z whatever the common scale. Only when c has fallen below 2⁻¹⁰⁰ are R
// and z multiplied by it, once, and c set back to 1. Cost per event O(p²)
// for p regressors, of which forgetting O(p).
//
// It is ready to predict once it has trained on at least p events. Columns
// that are, to working precision, combinations of earlier ones (a hashed
// bucket never seen, a constant feature without a prior) get coefficient 0
// — the basic solution — and are counted by Deficient, so that degraded
// numerical state is reported rather than hidden in NaNs.
type RLS struct {
	cfg     *RLSConfig // the spec's, shared by the keys
	ex      expansion
	qr      sqrtInfo
	theta   []float64
	trained int64
	last    int64   // newest event time seen by Learn
	c       float64 // R and z stored are the true ones divided by c (see above)
	hasLast bool
	rankDef int // dependent columns at the last solve
}

var _ Learner = (*RLS)(nil)

func newRLS(cfg RLSConfig, d int) *RLS { return newRLSShared(&cfg, d, new(*scratch)) }

// newRLSShared is newRLS with working space shared through *sp (made when nil).
func newRLSShared(cfg *RLSConfig, d int, sp **scratch) *RLS {
	ex := expansion{d: d, intercept: !cfg.NoIntercept, degree: cfg.Degree}
	p := ex.p()
	qr, theta := newSqrtInfo(p, useScratch(sp, p), p)
	m := &RLS{cfg: cfg, ex: ex, qr: qr, theta: theta, c: 1}
	m.qr.reset(priorDiag(cfg.P0))
	m.rankDef = p
	return m
}

// cloneInto implements Learner.
func (m *RLS) cloneInto(dst Learner) Learner {
	d, ok := dst.(*RLS)
	if !ok || len(d.qr.r) != len(m.qr.r) || len(d.qr.z) != len(m.qr.z) || len(d.theta) != len(m.theta) {
		return m.clone()
	}
	r, z, th := d.qr.r, d.qr.z, d.theta
	*d = *m
	copy(r, m.qr.r)
	copy(z, m.qr.z)
	copy(th, m.theta)
	d.qr.r, d.qr.z, d.theta = r, z, th
	return d
}

// rebind implements Learner.
func (m *RLS) rebind(sp **scratch) { m.qr.s = useScratch(sp, m.qr.p) }

// held implements Learner.
func (m *RLS) held() int64 {
	return int64(unsafe.Sizeof(*m)) + 8*int64(len(m.qr.r)+len(m.qr.z)+len(m.theta))
}

// touch implements Learner.
func (m *RLS) touch() float64 { return m.qr.r[0] + m.qr.r[len(m.qr.r)-1] + m.theta[len(m.theta)-1] }

// clone implements Learner.
func (m *RLS) clone() Learner {
	c := *m
	c.qr, c.theta = m.qr.clone(len(m.theta))
	copy(c.theta, m.theta)
	return &c
}

// priorDiag is the diagonal of R(0): A(0) = I/p0, so R(0) = I/√p0.
func priorDiag(p0 float64) float64 {
	if math.IsInf(p0, 1) {
		return 0
	}
	return 1 / math.Sqrt(p0)
}

// Advance implements Learner; forgetting by half-life is applied in Learn.
func (m *RLS) Advance(int64) {}

// Trained implements Learner.
func (m *RLS) Trained() int64 { return m.trained }

// Predict implements Learner: uᵀθ.
func (m *RLS) Predict(x []float64) (float64, bool) {
	m.ex.apply(m.qr.s.u, x)
	if m.trained < int64(len(m.theta)) {
		return 0, false
	}
	return dot(m.qr.s.u, m.theta), true
}

// predictShared implements Learner: uᵀθ with u of its own.
func (m *RLS) predictShared(x []float64) (float64, bool) {
	u := make([]float64, len(m.theta))
	m.ex.apply(u, x)
	if m.trained < int64(len(m.theta)) {
		return 0, false
	}
	return dot(u, m.theta), true
}

// Learn implements Learner.
func (m *RLS) Learn(x []float64, y float64, t int64) {
	m.ex.apply(m.qr.s.u, x)
	lambda := m.cfg.Forget
	if m.cfg.HalfLife > 0 {
		lambda = 1
		if m.hasLast && t > m.last {
			lambda = math.Pow(0.5, float64(t-m.last)/float64(m.cfg.HalfLife/time.Nanosecond))
		}
		if !m.hasLast || t > m.last {
			m.last, m.hasLast = t, true
		}
	}
	u := m.qr.s.u
	if lambda != 1 {
		m.c *= math.Sqrt(lambda)
		if m.c < minScale {
			m.qr.scale(m.c)
			m.c = 1
		}
	}
	if m.c != 1 {
		inv := 1 / m.c
		for i := range u {
			u[i] *= inv
		}
		y *= inv
	}
	m.qr.add(u, y)
	m.rankDef = m.qr.solve(m.theta)
	m.trained++
}

// minScale is how small the carried factor c gets before it is applied to R
// and z: stored entries then stay within 2¹⁰⁰ of the data's magnitude.
const minScale = 0x1p-100

// Deficient returns the number of regressors found linearly dependent at the
// last update (0 when the fit is of full rank).
func (m *RLS) Deficient() int { return m.rankDef }

// Coefficients implements the Coefficients interface.
func (m *RLS) Coefficients(dst []float64) []float64 {
	return append(dst[:0], m.theta...)
}

func (m *RLS) encode(w *encoder) {
	w.i64(m.trained)
	w.i64(m.last)
	w.bool(m.hasLast)
	w.f64(m.c)
	m.qr.encode(w)
}

func (m *RLS) decode(r *decoder) error {
	m.trained = r.i64()
	m.last = r.i64()
	m.hasLast = r.bool()
	m.c = 1
	if r.ver >= 12 {
		if m.c = r.f64(); !(m.c > 0 && m.c <= 1) {
			r.fail("rls scale factor out of (0, 1]")
		}
	}
	m.qr.decode(r)
	m.rankDef = m.qr.solve(m.theta)
	return r.err
}
