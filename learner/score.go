package learner

import (
	"math"
	"slices"

	"tidemark/window"
)

// Defaults of ScoreConfig.
const (
	DefaultRecent = 500   // scored events in each key's recent window
	DefaultFading = 0.999 // fading factor α
	maxRecent     = 1_000_000
	// DefaultLevel is the nominal coverage of the prediction intervals.
	DefaultLevel = 0.9
	// DefaultConformalStep is γ, the conformal quantile's step in units of
	// the key's recent RMSE (see Scorer).
	DefaultConformalStep = 0.1
)

// ScoreConfig configures prequential scoring. Zero fields take the defaults.
type ScoreConfig struct {
	// Recent is the number of most recent scored events of a key that the
	// windowed metrics cover. Memory: up to 8 bytes an event per key and
	// learner, allocated as events arrive. Default: DefaultRecent.
	Recent int
	Fading float64 // α ∈ (0, 1). Default: DefaultFading.
	// Level is the nominal coverage of the intervals, both methods. Default:
	// DefaultLevel.
	Level float64
	// ConformalStep is γ of the conformal intervals. Default:
	// DefaultConformalStep.
	ConformalStep float64
}

func (c ScoreConfig) withDefaults() ScoreConfig {
	if c.Level <= 0 || c.Level >= 1 {
		c.Level = DefaultLevel
	}
	if c.ConformalStep <= 0 {
		c.ConformalStep = DefaultConformalStep
	}
	if c.Recent <= 0 {
		c.Recent = DefaultRecent
	}
	c.Recent = min(c.Recent, maxRecent)
	if c.Fading <= 0 || c.Fading >= 1 {
		c.Fading = DefaultFading
	}
	return c
}

// Scorer keeps the prequential (test-then-train) error of one learner on one
// key: each event's prediction is scored against its target before the
// learner trains on it (Dawid 1984, "Statistical theory: the prequential
// approach", JRSS A 147:278–292). With e = target − prediction it tracks,
// over all scored events, MAE = Σ|e|/n, RMSE = √(Σe²/n) and bias = Σe/n; the
// same over a sliding window of the most recent scored events; and
// fading-factor estimates (Gama, Sebastião & Rodrigues 2013, "On evaluating
// stream learning algorithms", Machine Learning 90:317–346):
//
//	E_α(i) = S_α(i)/B_α(i),  S_α(i) = L_i + α·S_α(i−1),  B_α(i) = 1 + α·B_α(i−1)
//
// with L = |e| for the fading MAE and L = e² for the fading RMSE (which is
// √E_α). The windowed sums are compensated (window.Sum): an error that leaves
// the window is subtracted exactly, however large it was, and the sums are
// rebuilt from the window if their rounding bound ever exceeds window.RelTol
// of their scale, so recent figures equal a fresh computation over the
// window. Sums over all events are plain running sums, in event order.
//
// A learner's overall metrics pool its keys' scorers (see pool): they
// depend only on each key's events in order, never on how the partitions of
// a stream interleave, so a restart that interleaves differently ends in the
// same state.
//
// Not safe for concurrent use.
type Scorer struct {
	Scored, Unscored int64

	sumAbs, sumSq, sumErr float64

	rec                      []float64 // recent errors e, ring storage growing to recMax
	idx                      window.Index
	recMax                   int
	recAbs, recSq, recErr    window.Sum
	alpha                    float64
	fadAbs, fadSq, fadWeight float64

	// Interval coverage: how often the target fell inside the interval the
	// service would have quoted before the event (once the recent window
	// holds MinIntervalEvents errors), by both methods, and the widths
	// quoted. Normal: prediction ± z × the recent RMSE, z the two-sided
	// point of the level (common practice). Conformal: prediction ± cq.
	intervals, covered int64
	nWidth             float64
	cq                 float64 // the tracked quantile of |e|: the conformal half-width
	cqCovered          int64
	cqWidth            float64
	// The recent coverage of the conformal intervals, fading with the
	// scorer's α: Σ α^k · held and Σ α^k over the intervals quoted. Single
	// precision (a figure to read, not to add up exactly), so that a key of
	// rls + mean stays in its memory size class.
	cqFading, cqFadW float32
}

// The conformal intervals track, per key and learner, the level quantile of
// the absolute error |e| with the update of conformal PID control's
// quantile tracking (Angelopoulos, Candès & Tibshirani 2023, "Conformal PID
// Control for Time Series Prediction", NeurIPS; Gibbs & Candès 2021,
// "Adaptive Conformal Inference Under Distribution Shift", NeurIPS, for the
// same idea on the level): after each scored event,
//
//	q ← q + η (miss − (1 − level)),   miss = 1 if |e| > q, else 0,
//
// computed prequentially (|e| is known only after the event was predicted
// with the interval ± q). With a fixed step η and errors bounded by B its
// long-run miss rate is within (B + η)/(ηT) of 1 − level after T events,
// whatever the errors do (the paper's Proposition 1). Here η = γ × the key's
// recent RMSE before the event (γ = ScoreConfig.ConformalStep), so that the
// step follows the scale of the errors — the paper's scale-free choice,
// with the recent RMSE as the scale.

// quantileStep is one update of the tracked quantile.
func quantileStep(q, score, eta, level float64) float64 {
	miss := 0.0
	if score > q {
		miss = 1
	}
	return q + eta*(miss-(1-level))
}

// normalZ is the two-sided point of the normal distribution for level:
// Φ⁻¹((1 + level)/2) = √2 · erf⁻¹(level) (1.645 for 0.9, 1.96 for 0.95).
func normalZ(level float64) float64 { return math.Sqrt2 * math.Erfinv(level) }

// MinIntervalEvents is how many recent errors a key needs before an interval
// is quoted and its coverage counted.
const MinIntervalEvents = 30

// scorerInitial is the recent window's first storage, in errors: it doubles
// as errors arrive, up to Recent.
const scorerInitial = 2

func newScorer(recent int, alpha float64) Scorer {
	n := min(recent, scorerInitial)
	return Scorer{rec: make([]float64, n), idx: window.NewIndex(n), recMax: recent, alpha: alpha}
}

// cloneInto sets *dst, a scorer nobody reads any more, to a copy of s,
// reusing its storage when it has s's shape.
func (s *Scorer) cloneInto(dst *Scorer) {
	rec := dst.rec
	*dst = *s
	if len(rec) == len(s.rec) {
		copy(rec, s.rec)
		dst.rec = rec
	} else {
		dst.rec = slices.Clone(s.rec)
	}
}

// clone returns an independent copy.
func (s *Scorer) clone() Scorer {
	c := *s
	c.rec = slices.Clone(s.rec)
	return c
}

// pushRecent appends e to the recent window, evicting (and returning) the
// oldest error once the window is full.
func (s *Scorer) pushRecent(e float64) (old float64, evicted bool) {
	if s.idx.Full() {
		if n := s.idx.Size(); n < s.recMax {
			grown := make([]float64, min(2*n, s.recMax))
			for i := 0; i < s.idx.Len(); i++ {
				grown[i] = s.rec[s.idx.Slot(i)]
			}
			s.rec = grown
			s.idx.Resize(len(grown))
		} else {
			old, evicted = s.rec[s.idx.Pop()], true
		}
	}
	s.rec[s.idx.Push()] = e
	return old, evicted
}

// intervalConfig is the intervals' settings with the normal point worked
// out once.
type intervalConfig struct{ level, z, step float64 }

func newIntervalConfig(level, step float64) intervalConfig {
	return intervalConfig{level: level, z: normalZ(level), step: step}
}

// Score records one scored event; level and step are those of the
// engine's ScoreConfig.
func (s *Scorer) Score(target, prediction, level, step float64) {
	ic := newIntervalConfig(level, step)
	s.score(target, prediction, &ic)
}

func (s *Scorer) score(target, prediction float64, ic *intervalConfig) {
	level, step := ic.level, ic.step
	e := target - prediction
	a := math.Abs(e)
	scale := a // before any recent error, the first one sets the scale
	if n := s.idx.Len(); n > 0 {
		scale = math.Sqrt(math.Max(s.recSq.Value(), 0) / float64(n))
	}
	if n := s.idx.Len(); n >= MinIntervalEvents {
		half := ic.z * scale
		s.intervals++
		if a <= half {
			s.covered++
		}
		s.nWidth += 2 * half
		q := math.Max(s.cq, 0)
		held := 0.0
		if a <= q {
			s.cqCovered++
			held = 1
		}
		s.cqWidth += 2 * q
		s.cqFading = float32(held) + float32(s.alpha)*s.cqFading
		s.cqFadW = 1 + float32(s.alpha)*s.cqFadW
	}
	s.cq = quantileStep(s.cq, a, step*scale, level)
	s.Scored++
	s.sumAbs += math.Abs(e)
	s.sumSq += e * e
	s.sumErr += e
	if old, ok := s.pushRecent(e); ok {
		s.recAbs.Sub(math.Abs(old))
		s.recSq.Sub(old * old)
		s.recErr.Sub(old)
	}
	s.recAbs.Add(math.Abs(e))
	s.recSq.Add(e * e)
	s.recErr.Add(e)
	if s.recentImprecise() {
		s.rebuildRecent()
	}
	s.fadAbs = math.Abs(e) + s.alpha*s.fadAbs
	s.fadSq = e*e + s.alpha*s.fadSq
	s.fadWeight = 1 + s.alpha*s.fadWeight
}

// recentImprecise reports whether a recent sum's rounding bound exceeds
// window.RelTol of its scale (Σ|e| for Σ|e| and Σe, Σe² for itself).
func (s *Scorer) recentImprecise() bool {
	abs := s.recAbs.Value()
	return s.recAbs.Bound() > window.RelTol*abs || s.recErr.Bound() > window.RelTol*abs ||
		s.recSq.Bound() > window.RelTol*s.recSq.Value()
}

// rebuildRecent recomputes the recent sums from the recent window. O(n).
func (s *Scorer) rebuildRecent() {
	s.recAbs.Reset()
	s.recSq.Reset()
	s.recErr.Reset()
	for i := 0; i < s.idx.Len(); i++ {
		v := s.rec[s.idx.Slot(i)]
		s.recAbs.Add(math.Abs(v))
		s.recSq.Add(v * v)
		s.recErr.Add(v)
	}
}

// Unscore records an event the learner was not ready to predict.
func (s *Scorer) Unscore() { s.Unscored++ }

// Metrics is a snapshot of a Scorer. Error fields are nil when nothing has
// been scored, so that JSON shows null rather than a made-up zero.
type Metrics struct {
	Scored   int64         `json:"scored"`
	Unscored int64         `json:"unscored"`
	MAE      *float64      `json:"mae"`
	RMSE     *float64      `json:"rmse"`
	Bias     *float64      `json:"bias"`
	Recent   RecentMetrics `json:"recent"`
	Fading   Fading        `json:"fading"`
	// Intervals is how many prediction intervals were quoted (before each
	// event, once a key had MinIntervalEvents recent errors), Coverage the
	// share of the normal approximation's (prediction ± z × recent RMSE,
	// z for the level) that held the target — near the level when errors
	// are roughly normal and steady, lower after a shift — and Width their
	// mean width. Conformal is the same for the conformal intervals.
	Intervals int64            `json:"intervals"`
	Coverage  *float64         `json:"interval_coverage"`
	Width     *float64         `json:"interval_width"`
	Conformal ConformalMetrics `json:"conformal"`
}

// ConformalMetrics are the conformal intervals' figures: nominal level,
// achieved coverage over all quoted intervals and recently (fading, with
// the scorer's fading factor), and mean width.
type ConformalMetrics struct {
	Level          float64  `json:"level"`
	Coverage       *float64 `json:"coverage"`
	RecentCoverage *float64 `json:"recent_coverage"`
	Width          *float64 `json:"mean_width"`
}

// RecentMetrics is the error over the recent window of scored events.
type RecentMetrics struct {
	Events int      `json:"events"`
	MAE    *float64 `json:"mae"`
	RMSE   *float64 `json:"rmse"`
	Bias   *float64 `json:"bias"`
}

// Fading is the fading-factor error.
type Fading struct {
	Alpha float64  `json:"alpha"`
	MAE   *float64 `json:"mae"`
	RMSE  *float64 `json:"rmse"`
}

// Metrics returns the current metrics.
func (s *Scorer) Metrics() Metrics {
	var p pooled
	p.add(s)
	return p.metrics()
}

// pooled sums scorers: the metrics of the union of their events. Recent
// metrics pool each key's recent window; the fading estimate is
// ΣS_α/ΣB_α over keys. A key's own metrics are a pool of one.
type pooled struct {
	alpha                    float64
	scored, unscored         int64
	sumAbs, sumSq, sumErr    float64
	recN                     int
	recAbs, recSq, recErr    float64
	fadAbs, fadSq, fadWeight float64
	intervals, covered       int64
	level                    float64
	cqCovered                int64
	nWidth, cqWidth          float64
	cqFading, cqWeight       float64
}

func (p *pooled) add(s *Scorer) {
	p.alpha = s.alpha
	p.scored += s.Scored
	p.unscored += s.Unscored
	p.sumAbs += s.sumAbs
	p.sumSq += s.sumSq
	p.sumErr += s.sumErr
	p.recN += s.idx.Len()
	p.recAbs += s.recAbs.Value()
	p.recSq += s.recSq.Value()
	p.recErr += s.recErr.Value()
	p.fadAbs += s.fadAbs
	p.fadSq += s.fadSq
	p.fadWeight += s.fadWeight
	p.intervals += s.intervals
	p.covered += s.covered
	p.cqCovered += s.cqCovered
	p.nWidth += s.nWidth
	p.cqWidth += s.cqWidth
	p.cqFading += float64(s.cqFading)
	p.cqWeight += float64(s.cqFadW)
}

// pool is a learner's scorers over all keys, kept as running totals: the
// engine takes a key's scorer out before it scores an event and puts it back
// after, so a report reads the totals instead of visiting every key. Its
// float sums are exact (window.Exact) and rounded once when read, so they
// equal the keys' sums in any order: the totals do not depend on how the
// partitions of a stream interleave, nor on the order keys were added.
type pool struct {
	alpha              float64
	level              float64
	scored, unscored   int64
	recN               int64
	intervals, covered int64
	cqCovered          int64
	sums               [poolSums]window.Exact
}

const poolSums = 13

// floats lists the scorer's float sums in pool order.
func (s *Scorer) floats() [poolSums]float64 {
	return [poolSums]float64{s.sumAbs, s.sumSq, s.sumErr, s.recAbs.Value(), s.recSq.Value(), s.recErr.Value(), s.fadAbs, s.fadSq, s.fadWeight,
		s.nWidth, s.cqWidth, float64(s.cqFading), float64(s.cqFadW)}
}

// add puts s into the pool.
func (p *pool) add(s *Scorer) {
	p.alpha = s.alpha
	p.scored += s.Scored
	p.unscored += s.Unscored
	p.recN += int64(s.idx.Len())
	p.intervals += s.intervals
	p.covered += s.covered
	p.cqCovered += s.cqCovered
	for i, v := range s.floats() {
		p.sums[i].Add(v)
	}
}

// remove takes s, as it is now, out of the pool.
func (p *pool) remove(s *Scorer) {
	p.scored -= s.Scored
	p.unscored -= s.Unscored
	p.recN -= int64(s.idx.Len())
	p.intervals -= s.intervals
	p.covered -= s.covered
	p.cqCovered -= s.cqCovered
	for i, v := range s.floats() {
		p.sums[i].Sub(v)
	}
}

// metrics rounds the totals and reports them as a pool of one would.
func (p *pool) metrics() Metrics {
	q := pooled{alpha: p.alpha, level: p.level, scored: p.scored, unscored: p.unscored, recN: int(p.recN), intervals: p.intervals, covered: p.covered,
		cqCovered: p.cqCovered}
	v := func(i int) float64 { return p.sums[i].Value() }
	q.sumAbs, q.sumSq, q.sumErr = v(0), v(1), v(2)
	q.recAbs, q.recSq, q.recErr = v(3), v(4), v(5)
	q.fadAbs, q.fadSq, q.fadWeight = v(6), v(7), v(8)
	q.nWidth, q.cqWidth, q.cqFading, q.cqWeight = v(9), v(10), v(11), v(12)
	return q.metrics()
}

// recent returns the pooled recent MAE and RMSE (nil before any), reading
// only the two sums they need.
func (p *pool) recent() (n int64, mae, rmse *float64) {
	if p.recN == 0 {
		return 0, nil, nil
	}
	return p.recN, ptr(p.sums[3].Value() / float64(p.recN)), ptr(math.Sqrt(math.Max(p.sums[4].Value(), 0) / float64(p.recN)))
}

func (p *pooled) metrics() Metrics {
	m := Metrics{Scored: p.scored, Unscored: p.unscored, Fading: Fading{Alpha: p.alpha}, Intervals: p.intervals, Conformal: ConformalMetrics{Level: p.level}}
	if p.intervals > 0 {
		n := float64(p.intervals)
		m.Coverage, m.Width = ptr(float64(p.covered)/n), ptr(p.nWidth/n)
		m.Conformal.Coverage, m.Conformal.Width = ptr(float64(p.cqCovered)/n), ptr(p.cqWidth/n)
		if p.cqWeight > 0 {
			m.Conformal.RecentCoverage = ptr(p.cqFading / p.cqWeight)
		}
	}
	if p.scored > 0 {
		n := float64(p.scored)
		m.MAE, m.RMSE, m.Bias = ptr(p.sumAbs/n), ptr(math.Sqrt(p.sumSq/n)), ptr(p.sumErr/n)
		m.Fading.MAE = ptr(p.fadAbs / p.fadWeight)
		m.Fading.RMSE = ptr(math.Sqrt(p.fadSq / p.fadWeight))
	}
	if n := p.recN; n > 0 {
		m.Recent = RecentMetrics{Events: n, MAE: ptr(p.recAbs / float64(n)), RMSE: ptr(math.Sqrt(math.Max(p.recSq, 0) / float64(n))), Bias: ptr(p.recErr / float64(n))}
	}
	return m
}

func ptr(v float64) *float64 { return &v }

func (s *Scorer) encode(w *encoder) {
	w.i64(s.Scored)
	w.i64(s.Unscored)
	w.f64(s.sumAbs)
	w.f64(s.sumSq)
	w.f64(s.sumErr)
	w.int(s.idx.Len())
	for i := 0; i < s.idx.Len(); i++ {
		w.f64(s.rec[s.idx.Slot(i)])
	}
	for _, sum := range [3]*window.Sum{&s.recAbs, &s.recSq, &s.recErr} {
		st := sum.State()
		w.f64(st.Hi)
		w.f64(st.Lo)
		w.f64(st.Bound)
	}
	w.f64(s.fadAbs)
	w.f64(s.fadSq)
	w.f64(s.fadWeight)
	w.i64(s.intervals)
	w.i64(s.covered)
	w.f64(s.nWidth)
	w.f64(s.cq)
	w.i64(s.cqCovered)
	w.f64(s.cqWidth)
	w.f64(float64(s.cqFading))
	w.f64(float64(s.cqFadW))
}

func (s *Scorer) decode(r *decoder, version uint32) {
	s.Scored, s.Unscored = r.i64(), r.i64()
	s.sumAbs, s.sumSq, s.sumErr = r.f64(), r.f64(), r.f64()
	n := r.count(s.recMax, 8)
	size := max(n, min(scorerInitial, s.recMax), 1)
	s.rec = make([]float64, size)
	for i := 0; i < n; i++ {
		s.rec[i] = r.f64()
	}
	s.idx.Restore(size, n)
	if version >= 5 {
		for _, sum := range [3]*window.Sum{&s.recAbs, &s.recSq, &s.recErr} {
			sum.SetState(window.SumState{Hi: r.f64(), Lo: r.f64(), Bound: r.f64()})
		}
	} else {
		// Plain sums and an eviction count: rebuild from the window.
		r.f64()
		r.f64()
		r.f64()
		r.int()
		s.rebuildRecent()
	}
	s.fadAbs, s.fadSq, s.fadWeight = r.f64(), r.f64(), r.f64()
	if version >= 4 {
		s.intervals, s.covered = r.i64(), r.i64()
	}
	if version >= 8 {
		s.nWidth, s.cq, s.cqCovered, s.cqWidth = r.f64(), r.f64(), r.i64(), r.f64()
		s.cqFading, s.cqFadW = float32(r.f64()), float32(r.f64())
	}
}
