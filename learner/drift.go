package learner

import "math"

// Defaults of DriftConfig. δ and λ are in units of the standard deviation of
// the watched series (see PageHinkley), so they do not depend on the target's
// units. With δ = 0.5 a rise in the mean absolute error of half a standard
// deviation or more is tracked; λ = 25 keeps the chance of a false alarm on a
// stationary stream negligible (the statistic of a random walk with drift −δ
// exceeds λ with probability about exp(−2δλ) = e⁻²⁵ per excursion, a
// Brownian-motion approximation) while a shift of 3σ alarms in about
// 25/2.5 = 10 events. MinEvents scored events are needed before any alarm.
const (
	DefaultDriftDelta  = 0.5
	DefaultDriftLambda = 25
	DefaultDriftMin    = 30
)

// Drift detectors (DriftConfig.Method).
const (
	DriftPageHinkley = "page-hinkley"
	DriftADWIN       = "adwin"
)

// DriftConfig configures the drift watch. Zero fields take defaults.
type DriftConfig struct {
	// Method is DriftPageHinkley (the default) or DriftADWIN.
	Method    string
	Delta     float64 // δ, tolerated rise per event, in standard deviations. Default: DefaultDriftDelta.
	Lambda    float64 // λ, alarm threshold, in standard deviations. Default: DefaultDriftLambda.
	MinEvents int     // warm-up before alarms, and how long a drift state lasts. Default: DefaultDriftMin.
	Raw       bool    // use δ and λ in the series' own units (no standardisation).
	// ADWINDelta is ADWIN's confidence δ. Default: DefaultADWINDelta.
	ADWINDelta float64
}

func (c DriftConfig) withDefaults() DriftConfig {
	if c.Method == "" {
		c.Method = DriftPageHinkley
	}
	if c.ADWINDelta <= 0 || c.ADWINDelta >= 1 {
		c.ADWINDelta = DefaultADWINDelta
	}
	if c.Delta <= 0 {
		c.Delta = DefaultDriftDelta
	}
	if c.Lambda <= 0 {
		c.Lambda = DefaultDriftLambda
	}
	if c.MinEvents <= 0 {
		c.MinEvents = DefaultDriftMin
	}
	return c
}

// DriftState is a drift detector's verdict.
type DriftState int

// Drift states.
const (
	Stable  DriftState = iota
	Warning            // the statistic passed λ/2
	Drift              // an alarm fired within the last MinEvents events
)

func (s DriftState) String() string {
	switch s {
	case Warning:
		return "warning"
	case Drift:
		return "drift"
	}
	return "stable"
}

// PageHinkley detects a rise in the mean of a series (Page 1954, "Continuous
// inspection schemes", Biometrika 41:100–115; in the form of Mouss et al.
// 2004 and Gama et al. 2013). For inputs x₁, x₂, … with running mean x̄ₜ:
//
//	mₜ = Σ_{i≤t} (xᵢ − x̄ᵢ − δ),  Mₜ = min_{i≤t} mᵢ,  PHₜ = mₜ − Mₜ
//
// and it alarms when PHₜ > λ. Unless Raw is set, each term is divided by the
// running standard deviation σ of the inputs seen before it, so δ and λ are
// in standard deviations. After an alarm the statistic restarts from scratch.
// The engine feeds it each learner's absolute prequential error. When the
// configuration selects ADWIN, the detector is the ADWIN it holds instead
// (ad), so that a key's slot keeps one detector of one size either way.
type PageHinkley struct {
	cfg    *DriftConfig // shared by an engine's detectors
	ad     *ADWIN       // the detector, when DriftConfig.Method is DriftADWIN
	n      int64
	mean   float64
	m2     float64
	cum    float64
	min    float64
	alarms int32 // saturating; an alarm has fired when it is positive
	since  int32 // events since the last alarm (or since the start), saturating
}

// NewPageHinkley returns a Page–Hinkley detector with cfg (defaults
// filled in; the method is Page–Hinkley whatever cfg says).
func NewPageHinkley(cfg DriftConfig) *PageHinkley {
	cfg.Method = DriftPageHinkley
	p := newPageHinkley(cfg)
	return &p
}

func newPageHinkley(cfg DriftConfig) PageHinkley {
	c := cfg.withDefaults()
	return newPageHinkleyShared(&c)
}

// newPageHinkleyShared is newPageHinkley with a configuration that already
// has its defaults, shared by the caller's detectors.
func newPageHinkleyShared(cfg *DriftConfig) PageHinkley {
	p := PageHinkley{cfg: cfg, since: math.MaxInt32}
	if cfg.Method == DriftADWIN {
		p.ad = NewADWIN(cfg.ADWINDelta, 0)
	}
	return p
}

// clone returns a copy that shares nothing with p.
func (p PageHinkley) clone() PageHinkley {
	if p.ad != nil {
		p.ad = p.ad.clone()
	}
	return p
}

// Add feeds one value and reports whether it raised an alarm.
func (p *PageHinkley) Add(x float64) bool {
	if p.ad != nil {
		return p.ad.Add(x)
	}
	sd := 1.0
	if !p.cfg.Raw && p.n >= 2 {
		sd = math.Sqrt(p.m2 / float64(p.n-1))
	}
	p.n++
	d := x - p.mean
	p.mean += d / float64(p.n)
	p.m2 += d * (x - p.mean)
	if p.since < math.MaxInt32 {
		p.since++
	}
	if !p.cfg.Raw && (p.n < 2 || sd == 0) {
		return false // no scale yet
	}
	p.cum += (x-p.mean)/sd - p.cfg.Delta
	p.min = math.Min(p.min, p.cum)
	if p.n >= int64(p.cfg.MinEvents) && p.cum-p.min > p.cfg.Lambda {
		if p.alarms < math.MaxInt32 {
			p.alarms++
		}
		p.n, p.mean, p.m2, p.cum, p.min = 0, 0, 0, 0, 0
		p.since = 0
		return true
	}
	return false
}

// Statistic returns PHₜ = mₜ − Mₜ.
func (p *PageHinkley) Statistic() float64 { return p.cum - p.min }

// Alarms returns the number of alarms raised.
func (p *PageHinkley) Alarms() int64 {
	if p.ad != nil {
		return p.ad.Alarms()
	}
	return int64(p.alarms)
}

// State returns drift within MinEvents events of the last alarm, warning while
// the statistic is above λ/2, and stable otherwise.
func (p *PageHinkley) State() DriftState {
	if p.ad != nil {
		return p.ad.State(p.cfg.MinEvents)
	}
	switch {
	case p.alarms > 0 && int64(p.since) <= int64(p.cfg.MinEvents):
		return Drift
	case p.Statistic() > p.cfg.Lambda/2:
		return Warning
	}
	return Stable
}

func (p *PageHinkley) encode(w *encoder) {
	w.i64(p.n)
	w.f64(p.mean)
	w.f64(p.m2)
	w.f64(p.cum)
	w.f64(p.min)
	w.i64(int64(p.since))
	w.i64(int64(p.alarms))
	w.bool(p.alarms > 0)
	w.bool(p.ad != nil)
	if p.ad != nil {
		p.ad.encode(w)
	}
}

func (p *PageHinkley) decode(r *decoder) {
	p.n, p.mean, p.m2, p.cum, p.min = r.i64(), r.f64(), r.f64(), r.f64(), r.f64()
	since := r.i64()
	p.since = int32(min(max(since, 0), math.MaxInt32))
	p.alarms = int32(min(max(r.i64(), 0), math.MaxInt32))
	r.bool() // alarmed: alarms > 0
	if r.ver >= 9 && r.bool() {
		if p.ad == nil {
			r.fail("an ADWIN detector in a state watched by Page–Hinkley")
			return
		}
		p.ad.decode(r)
	}
}
