package learner

import (
	"fmt"
	"math"
	"strconv"
	"strings"
	"time"
)

// Kind is a learner kind.
type Kind int

// The learner kinds.
const (
	KindKNN Kind = iota + 1
	KindRLS
	KindSlidingRLS
	KindMean
)

var kindNames = map[Kind]string{KindKNN: "knn", KindRLS: "rls", KindSlidingRLS: "sliding-rls", KindMean: "mean"}

func (k Kind) String() string {
	if s, ok := kindNames[k]; ok {
		return s
	}
	return "Kind(" + strconv.Itoa(int(k)) + ")"
}

// ParseKind parses a kind name.
func ParseKind(s string) (Kind, error) {
	for k, name := range kindNames {
		if name == s {
			return k, nil
		}
	}
	return 0, fmt.Errorf("%w: unknown kind %q (want knn, rls, sliding-rls or mean)", ErrInvalidSpec, s)
}

// Weighting is how k-NN combines its neighbours' targets.
type Weighting int

// Weightings.
const (
	WeightEqual   Weighting = iota // the plain mean of the k targets
	WeightInverse                  // inverse-distance weights (Shepard 1968)
)

func (w Weighting) String() string {
	if w == WeightInverse {
		return "inverse"
	}
	return "equal"
}

// Scaling is how k-NN scales features before measuring distance.
type Scaling int

// Scalings.
const (
	ScaleZScore Scaling = iota // standardise by the window's running mean and deviation
	ScaleNone                  // raw values
)

func (s Scaling) String() string {
	if s == ScaleNone {
		return "none"
	}
	return "zscore"
}

// Window bounds what a windowed learner remembers: the last Count events, the
// events within Span of event time of the newest, or (All) every event up to
// the learner's memory cap. Exactly one is set.
type Window struct {
	Count int
	Span  time.Duration
	All   bool
}

func (w Window) String() string {
	switch {
	case w.All:
		return "all"
	case w.Span > 0:
		return formatDuration(w.Span)
	default:
		return strconv.Itoa(w.Count)
	}
}

// Defaults. The k-NN k of 10 and the RLS prior p0 = 10⁶ are common practice
// (a large p0 is a weak prior: Haykin, Adaptive Filter Theory, 4th ed., §9.6,
// recommends P(0) = δ⁻¹I with δ small).
const (
	DefaultK            = 10
	DefaultKNNWindow    = 1000
	DefaultSlidingCount = 500
	DefaultMemoryCap    = 100_000 // events held by a time or "all" window
	DefaultP0           = 1e6
	MaxK                = 10_000
	MaxMemoryCap        = 10_000_000
)

// KNNConfig configures a k-NN learner. Zero fields take the defaults.
type KNNConfig struct {
	K      int       // neighbours. Default: DefaultK. Range 1..MaxK.
	Window Window    // Default: Count DefaultKNNWindow.
	Weight Weighting // Default: WeightEqual.
	Scale  Scaling   // Default: ScaleZScore.
	Max    int       // memory cap of time and "all" windows. Default: DefaultMemoryCap.
}

// RLSConfig configures a recursive-least-squares learner.
type RLSConfig struct {
	Forget      float64       // forgetting factor λ ∈ (0, 1]. Default: 1 (cumulative).
	HalfLife    time.Duration // if set, λ per event = 0.5^(Δt/HalfLife), Δt in event time; excludes Forget.
	P0          float64       // prior P(0) = P0·I, > 0; +Inf for no prior. Default: DefaultP0.
	NoIntercept bool          // drop the leading 1. Default: false (intercept on).
	Degree      int           // 1, or 2 to add squares and cross products. Default: 1.
}

// SlidingConfig configures an exact sliding-window least-squares learner.
type SlidingConfig struct {
	Window      Window // Count or Span ("all" is rls:forget=1). Default: Count DefaultSlidingCount.
	NoIntercept bool
	Degree      int
	Max         int // memory cap of a time window. Default: DefaultMemoryCap.
}

// MeanConfig configures the mean-target baseline.
type MeanConfig struct {
	Window Window // Default: All.
	Max    int    // memory cap of a time window. Default: DefaultMemoryCap.
}

// Spec is a parsed learner spec (DESIGN.md, "Learner spec").
type Spec struct {
	Name    string // the name= parameter, else Text
	Text    string // the spec as written
	Kind    Kind
	KNN     KNNConfig
	RLS     RLSConfig
	Sliding SlidingConfig
	Mean    MeanConfig
}

// NeedsTime reports whether the learner uses event time (a time window or a
// half-life), so that every event must carry one.
func (s *Spec) NeedsTime() bool {
	switch s.Kind {
	case KindKNN:
		return s.KNN.Window.Span > 0
	case KindRLS:
		return s.RLS.HalfLife > 0
	case KindSlidingRLS:
		return s.Sliding.Window.Span > 0
	case KindMean:
		return s.Mean.Window.Span > 0
	}
	return false
}

// Canonical returns the spec with every parameter spelled out, defaults
// included, in a fixed order; two specs that build the same learner have the
// same canonical form (the name aside).
func (s *Spec) Canonical() string {
	switch s.Kind {
	case KindKNN:
		c := s.KNN
		return fmt.Sprintf("knn:k=%d,window=%s,weight=%s,scale=%s,max=%d", c.K, c.Window, c.Weight, c.Scale, c.Max)
	case KindRLS:
		c := s.RLS
		fh := "forget=" + strconv.FormatFloat(c.Forget, 'g', -1, 64)
		if c.HalfLife > 0 {
			fh = "half_life=" + formatDuration(c.HalfLife)
		}
		return fmt.Sprintf("rls:%s,p0=%s,intercept=%t,degree=%d", fh, formatP0(c.P0), !c.NoIntercept, c.Degree)
	case KindSlidingRLS:
		c := s.Sliding
		return fmt.Sprintf("sliding-rls:window=%s,intercept=%t,degree=%d,max=%d", c.Window, !c.NoIntercept, c.Degree, c.Max)
	case KindMean:
		return fmt.Sprintf("mean:window=%s,max=%d", s.Mean.Window, s.Mean.Max)
	}
	return ""
}

// ParseSpec parses KIND[:PARAM=VALUE,...]. Errors wrap ErrInvalidSpec and
// name the parameter, the value and what is allowed.
func ParseSpec(text string) (Spec, error) {
	text = strings.TrimSpace(text)
	kindText, params, _ := strings.Cut(text, ":")
	kind, err := ParseKind(strings.TrimSpace(kindText))
	if err != nil {
		return Spec{}, fmt.Errorf("spec %q: %w", text, err)
	}
	s := Spec{Text: text, Kind: kind}
	s.setDefaults()
	seen := map[string]bool{}
	if strings.TrimSpace(params) != "" {
		for _, kv := range strings.Split(params, ",") {
			key, val, ok := strings.Cut(kv, "=")
			key, val = strings.TrimSpace(key), strings.TrimSpace(val)
			if !ok || key == "" {
				return Spec{}, fmt.Errorf("%w: spec %q: %q is not PARAM=VALUE", ErrInvalidSpec, text, kv)
			}
			if seen[key] {
				return Spec{}, fmt.Errorf("%w: spec %q: parameter %s given twice", ErrInvalidSpec, text, key)
			}
			seen[key] = true
			if err := s.set(key, val); err != nil {
				return Spec{}, fmt.Errorf("%w: spec %q: %v", ErrInvalidSpec, text, err)
			}
		}
	}
	if s.Kind == KindRLS && seen["forget"] && seen["half_life"] {
		return Spec{}, fmt.Errorf("%w: spec %q: forget and half_life exclude each other; give one", ErrInvalidSpec, text)
	}
	if s.Name == "" {
		s.Name = text
	}
	return s, nil
}

func (s *Spec) setDefaults() {
	s.KNN = KNNConfig{K: DefaultK, Window: Window{Count: DefaultKNNWindow}, Max: DefaultMemoryCap}
	s.RLS = RLSConfig{Forget: 1, P0: DefaultP0, Degree: 1}
	s.Sliding = SlidingConfig{Window: Window{Count: DefaultSlidingCount}, Degree: 1, Max: DefaultMemoryCap}
	s.Mean = MeanConfig{Window: Window{All: true}, Max: DefaultMemoryCap}
}

func (s *Spec) set(key, val string) error {
	if key == "name" {
		if val == "" {
			return fmt.Errorf("name= is empty; give a name")
		}
		s.Name = val
		return nil
	}
	switch s.Kind {
	case KindKNN:
		c := &s.KNN
		switch key {
		case "k":
			return intParam(&c.K, key, val, 1, MaxK)
		case "window":
			return windowParam(&c.Window, key, val, true)
		case "weight":
			switch val {
			case "equal":
				c.Weight = WeightEqual
			case "inverse":
				c.Weight = WeightInverse
			default:
				return fmt.Errorf("weight=%s: want equal or inverse", val)
			}
			return nil
		case "scale":
			switch val {
			case "zscore":
				c.Scale = ScaleZScore
			case "none":
				c.Scale = ScaleNone
			default:
				return fmt.Errorf("scale=%s: want zscore or none", val)
			}
			return nil
		case "max":
			return intParam(&c.Max, key, val, 1, MaxMemoryCap)
		}
		return unknownParam(key, "k, window, weight, scale, max, name")
	case KindRLS:
		c := &s.RLS
		switch key {
		case "forget":
			v, err := strconv.ParseFloat(val, 64)
			if err != nil || !(v > 0 && v <= 1) {
				return fmt.Errorf("forget=%s: want a number in (0, 1]", val)
			}
			c.Forget = v
			return nil
		case "half_life":
			d, err := parseDuration(val)
			if err != nil || d <= 0 {
				return fmt.Errorf("half_life=%s: want a positive duration such as 90m, 12h or 7d", val)
			}
			c.HalfLife = d
			return nil
		case "p0":
			if val == "inf" {
				c.P0 = math.Inf(1)
				return nil
			}
			v, err := strconv.ParseFloat(val, 64)
			if err != nil || !(v > 0) || math.IsInf(v, 0) {
				return fmt.Errorf("p0=%s: want a positive number or inf", val)
			}
			c.P0 = v
			return nil
		case "intercept":
			return interceptParam(&c.NoIntercept, val)
		case "degree":
			return intParam(&c.Degree, key, val, 1, 2)
		}
		return unknownParam(key, "forget, half_life, p0, intercept, degree, name")
	case KindSlidingRLS:
		c := &s.Sliding
		switch key {
		case "window":
			return windowParam(&c.Window, key, val, false)
		case "intercept":
			return interceptParam(&c.NoIntercept, val)
		case "degree":
			return intParam(&c.Degree, key, val, 1, 2)
		case "max":
			return intParam(&c.Max, key, val, 1, MaxMemoryCap)
		}
		return unknownParam(key, "window, intercept, degree, max, name")
	case KindMean:
		c := &s.Mean
		switch key {
		case "window":
			return windowParam(&c.Window, key, val, true)
		case "max":
			return intParam(&c.Max, key, val, 1, MaxMemoryCap)
		}
		return unknownParam(key, "window, max, name")
	}
	return unknownParam(key, "")
}

func unknownParam(key, allowed string) error {
	return fmt.Errorf("unknown parameter %q (allowed: %s)", key, allowed)
}

func intParam(dst *int, key, val string, lo, hi int) error {
	v, err := strconv.Atoi(val)
	if err != nil || v < lo || v > hi {
		return fmt.Errorf("%s=%s: want an integer from %d to %d", key, val, lo, hi)
	}
	*dst = v
	return nil
}

func interceptParam(noIntercept *bool, val string) error {
	switch val {
	case "true":
		*noIntercept = false
	case "false":
		*noIntercept = true
	default:
		return fmt.Errorf("intercept=%s: want true or false", val)
	}
	return nil
}

func windowParam(w *Window, key, val string, allowAll bool) error {
	if val == "all" {
		if !allowAll {
			return fmt.Errorf("%s=all: not allowed here; want a count or a duration (use rls:forget=1 for a cumulative fit)", key)
		}
		*w = Window{All: true}
		return nil
	}
	if n, err := strconv.Atoi(val); err == nil {
		if n < 1 || n > MaxMemoryCap {
			return fmt.Errorf("%s=%s: want a count from 1 to %d, a duration such as 6h, or all", key, val, MaxMemoryCap)
		}
		*w = Window{Count: n}
		return nil
	}
	d, err := parseDuration(val)
	if err != nil || d <= 0 {
		return fmt.Errorf("%s=%s: want a count, a positive duration such as 90m, 6h or 7d, or all", key, val)
	}
	*w = Window{Span: d}
	return nil
}

// parseDuration is time.ParseDuration with a "d" suffix for whole days.
func parseDuration(s string) (time.Duration, error) {
	if n, ok := strings.CutSuffix(s, "d"); ok {
		days, err := strconv.Atoi(n)
		if err != nil || days < 1 || days > 100_000 {
			return 0, fmt.Errorf("bad day count %q", s)
		}
		return time.Duration(days) * 24 * time.Hour, nil
	}
	return time.ParseDuration(s)
}

func formatDuration(d time.Duration) string {
	if d%(24*time.Hour) == 0 {
		return strconv.FormatInt(int64(d/(24*time.Hour)), 10) + "d"
	}
	return d.String()
}

func formatP0(p float64) string {
	if math.IsInf(p, 1) {
		return "inf"
	}
	return strconv.FormatFloat(p, 'g', -1, 64)
}
