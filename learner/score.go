package learner

import (
	"math"

	"tidemark/window"
)

// Defaults of ScoreConfig.
const (
	DefaultRecent    = 1000  // scored events in the recent window of a learner overall
	DefaultKeyRecent = 100   // the same, per key (memory: 8 bytes an event per key and learner)
	DefaultFading    = 0.999 // fading factor α
)

// ScoreConfig configures prequential scoring. Zero fields take the defaults.
type ScoreConfig struct {
	Recent    int     // recent window, overall. Default: DefaultRecent.
	KeyRecent int     // recent window, per key. Default: DefaultKeyRecent.
	Fading    float64 // α ∈ (0, 1). Default: DefaultFading.
}

func (c ScoreConfig) withDefaults() ScoreConfig {
	if c.Recent <= 0 {
		c.Recent = DefaultRecent
	}
	if c.KeyRecent <= 0 {
		c.KeyRecent = DefaultKeyRecent
	}
	if c.Fading <= 0 || c.Fading >= 1 {
		c.Fading = DefaultFading
	}
	return c
}

// Scorer keeps the prequential (test-then-train) error of one learner: each
// event's prediction is scored against its target before the learner trains
// on it (Dawid 1984, "Statistical theory: the prequential approach", JRSS A
// 147:278–292). With e = target − prediction it tracks, over all scored
// events, MAE = Σ|e|/n, RMSE = √(Σe²/n) and bias = Σe/n; the same over a
// sliding window of the most recent scored events; and fading-factor
// estimates (Gama, Sebastião & Rodrigues 2013, "On evaluating stream learning
// algorithms", Machine Learning 90:317–346):
//
//	E_α(i) = S_α(i)/B_α(i),  S_α(i) = L_i + α·S_α(i−1),  B_α(i) = 1 + α·B_α(i−1)
//
// with L = |e| for the fading MAE and L = e² for the fading RMSE (which is
// √E_α). The windowed sums are rebuilt from the window every window-length
// of evictions, so they stay exact to rounding. Sums over all events are
// plain running sums, in event order.
//
// Not safe for concurrent use.
type Scorer struct {
	Scored, Unscored int64

	sumAbs, sumSq, sumErr float64

	recent                   *window.Ring[float64] // errors e
	recAbs, recSq, recErr    float64
	recEvicted               int
	alpha                    float64
	fadAbs, fadSq, fadWeight float64
}

func newScorer(recent int, alpha float64) Scorer {
	return Scorer{recent: window.NewRing[float64](recent), alpha: alpha}
}

// Score records one scored event.
func (s *Scorer) Score(target, prediction float64) {
	e := target - prediction
	s.Scored++
	s.sumAbs += math.Abs(e)
	s.sumSq += e * e
	s.sumErr += e
	if old, ok := s.recent.Push(e); ok {
		s.recAbs -= math.Abs(old)
		s.recSq -= old * old
		s.recErr -= old
		s.recEvicted++
	}
	s.recAbs += math.Abs(e)
	s.recSq += e * e
	s.recErr += e
	if s.recEvicted >= s.recent.Cap() {
		s.recAbs, s.recSq, s.recErr = 0, 0, 0
		for i := 0; i < s.recent.Len(); i++ {
			v := s.recent.At(i)
			s.recAbs += math.Abs(v)
			s.recSq += v * v
			s.recErr += v
		}
		s.recEvicted = 0
	}
	s.fadAbs = math.Abs(e) + s.alpha*s.fadAbs
	s.fadSq = e*e + s.alpha*s.fadSq
	s.fadWeight = 1 + s.alpha*s.fadWeight
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
	m := Metrics{Scored: s.Scored, Unscored: s.Unscored, Fading: Fading{Alpha: s.alpha}}
	if s.Scored > 0 {
		n := float64(s.Scored)
		m.MAE, m.RMSE, m.Bias = ptr(s.sumAbs/n), ptr(math.Sqrt(s.sumSq/n)), ptr(s.sumErr/n)
		m.Fading.MAE = ptr(s.fadAbs / s.fadWeight)
		m.Fading.RMSE = ptr(math.Sqrt(s.fadSq / s.fadWeight))
	}
	if n := s.recent.Len(); n > 0 {
		m.Recent = RecentMetrics{Events: n, MAE: ptr(s.recAbs / float64(n)), RMSE: ptr(math.Sqrt(math.Max(s.recSq, 0) / float64(n))), Bias: ptr(s.recErr / float64(n))}
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
	w.int(s.recent.Len())
	for i := 0; i < s.recent.Len(); i++ {
		w.f64(s.recent.At(i))
	}
	w.f64(s.recAbs)
	w.f64(s.recSq)
	w.f64(s.recErr)
	w.int(s.recEvicted)
	w.f64(s.fadAbs)
	w.f64(s.fadSq)
	w.f64(s.fadWeight)
}

func (s *Scorer) decode(r *decoder) {
	s.Scored, s.Unscored = r.i64(), r.i64()
	s.sumAbs, s.sumSq, s.sumErr = r.f64(), r.f64(), r.f64()
	n := r.count(s.recent.Cap(), 8)
	s.recent.Reset()
	for i := 0; i < n; i++ {
		s.recent.Push(r.f64())
	}
	s.recAbs, s.recSq, s.recErr = r.f64(), r.f64(), r.f64()
	s.recEvicted = r.int()
	s.fadAbs, s.fadSq, s.fadWeight = r.f64(), r.f64(), r.f64()
}
