package learner

import (
	"fmt"
	"math"
	"slices"
	"time"
)

// DefaultHashBuckets is the number of buckets categorical features are hashed
// into when FeatureConfig.HashBuckets is zero.
const DefaultHashBuckets = 16

// FeatureConfig fixes how events become feature vectors.
type FeatureConfig struct {
	// Numeric and Categorical fix the schema up front. When both are empty the
	// schema is taken from the first valid event: its numeric features are the
	// numeric schema, its string features the categorical one.
	Numeric     []string
	Categorical []string
	// HashBuckets is the number of one-hot buckets shared by all categorical
	// features. Default: DefaultHashBuckets. Used only when the schema has a
	// categorical feature.
	HashBuckets int
	// TimeFeatures adds hour of day and day of week (UTC) as sin/cos pairs
	// computed from the event time, which every event must then carry.
	// Default: false.
	TimeFeatures bool
}

// Schema is the fixed mapping from an event's named features to the vector
// x ∈ ℝᵈ every learner sees. Its layout, in order:
//
//  1. numeric features, raw, in lexicographic order of their names;
//  2. HashBuckets one-hot buckets, present when there is any categorical
//     feature: the feature named n with value v adds 1 to bucket
//     FNV-1a-64(n ∥ 0x00 ∥ v) mod HashBuckets — the hashing trick of
//     Weinberger, Dasgupta, Langford, Smola & Attenberg (2009), "Feature
//     hashing for large scale multitask learning", ICML, without the sign hash;
//  3. with TimeFeatures, sin and cos of 2π·h/24 and of 2π·w/7, where h is the
//     hour of day with its fraction and w the day of week (Sunday = 0) with the
//     fraction of the day, both in UTC.
//
// A Schema is immutable once built and safe for concurrent use.
type Schema struct {
	Numeric     []string
	Categorical []string
	Buckets     int
	Time        bool
}

// NewSchema builds the schema of cfg when it fixes one; ok is false when the
// schema is to be taken from the first event.
func NewSchema(cfg FeatureConfig) (s *Schema, ok bool, err error) {
	if len(cfg.Numeric) == 0 && len(cfg.Categorical) == 0 {
		return nil, false, nil
	}
	s = &Schema{Numeric: slices.Clone(cfg.Numeric), Categorical: slices.Clone(cfg.Categorical), Time: cfg.TimeFeatures}
	slices.Sort(s.Numeric)
	slices.Sort(s.Categorical)
	all := append(slices.Clone(s.Numeric), s.Categorical...)
	slices.Sort(all)
	for i := 1; i < len(all); i++ {
		if all[i] == all[i-1] {
			return nil, false, fmt.Errorf("%w: feature %q is listed twice", ErrInvalidSpec, all[i])
		}
	}
	if len(s.Categorical) > 0 {
		s.Buckets = bucketsOf(cfg)
	}
	return s, true, nil
}

// SchemaOf derives a schema from an event's features.
func SchemaOf(ev *Event, cfg FeatureConfig) *Schema {
	s := &Schema{Time: cfg.TimeFeatures}
	for _, f := range ev.Features {
		if f.IsStr {
			s.Categorical = append(s.Categorical, f.Name)
		} else {
			s.Numeric = append(s.Numeric, f.Name)
		}
	}
	if len(s.Categorical) > 0 {
		s.Buckets = bucketsOf(cfg)
	}
	return s
}

func bucketsOf(cfg FeatureConfig) int {
	if cfg.HashBuckets > 0 {
		return cfg.HashBuckets
	}
	return DefaultHashBuckets
}

// Dim returns the length of the vectors the schema produces.
func (s *Schema) Dim() int {
	d := len(s.Numeric) + s.Buckets
	if s.Time {
		d += 4
	}
	return d
}

// Names returns a name for every coordinate of the vector, in order.
func (s *Schema) Names() []string {
	names := slices.Clone(s.Numeric)
	for b := 0; b < s.Buckets; b++ {
		names = append(names, fmt.Sprintf("#bucket%d", b))
	}
	if s.Time {
		names = append(names, "#hour_sin", "#hour_cos", "#weekday_sin", "#weekday_cos")
	}
	return names
}

// Vector writes ev's features into dst (length Dim) in schema order and
// returns the number of event features the schema does not know (ignored).
// A schema feature that is missing or of the wrong type, or a missing time
// when time features are on, is an error wrapping ErrRejected. Vector
// allocates nothing: ev.Features must be sorted by name, as DecodeEvent and
// ValidateEvent leave them.
func (s *Schema) Vector(dst []float64, ev *Event) (ignored int, err error) {
	if len(dst) != s.Dim() {
		panic(badDim)
	}
	clear(dst)
	nd := len(s.Numeric)
	in, ic := 0, 0 // next unmatched numeric and categorical schema names
	for _, f := range ev.Features {
		switch {
		case in < nd && s.Numeric[in] == f.Name:
			if f.IsStr {
				return 0, reject(RejectSchema, "feature %q must be a number, got a string", f.Name)
			}
			dst[in] = f.Num
			in++
		case ic < len(s.Categorical) && s.Categorical[ic] == f.Name:
			if !f.IsStr {
				return 0, reject(RejectSchema, "feature %q must be a string (categorical), got a number", f.Name)
			}
			dst[nd+int(hashFeature(f.Name, f.Str)%uint64(s.Buckets))]++
			ic++
		default:
			if (in < nd && f.Name > s.Numeric[in]) || (ic < len(s.Categorical) && f.Name > s.Categorical[ic]) {
				return 0, s.missing(in, ic, f.Name)
			}
			ignored++
		}
	}
	if in < nd || ic < len(s.Categorical) {
		return 0, s.missing(in, ic, "\xff")
	}
	if s.Time {
		if !ev.HasTime {
			return 0, reject(RejectTime, "time is missing and time features are on")
		}
		t := time.Unix(0, ev.Time).UTC()
		day := float64(t.Hour()*3600+t.Minute()*60+t.Second())/86400 + float64(t.Nanosecond())/86400e9
		o := nd + s.Buckets
		dst[o], dst[o+1] = math.Sincos(2 * math.Pi * day)
		dst[o+2], dst[o+3] = math.Sincos(2 * math.Pi * (float64(t.Weekday()) + day) / 7)
	}
	return ignored, nil
}

// missing reports the first schema feature before the event name seen that
// the event lacks.
func (s *Schema) missing(in, ic int, seen string) error {
	name := ""
	if in < len(s.Numeric) && s.Numeric[in] < seen {
		name = s.Numeric[in]
	}
	if ic < len(s.Categorical) && s.Categorical[ic] < seen && (name == "" || s.Categorical[ic] < name) {
		name = s.Categorical[ic]
	}
	if name == "" && in < len(s.Numeric) {
		name = s.Numeric[in]
	}
	if name == "" && ic < len(s.Categorical) {
		name = s.Categorical[ic]
	}
	return reject(RejectSchema, "feature %q is missing", name)
}

// hashFeature is FNV-1a 64 over name, a zero byte and value, written out so
// that it allocates nothing (FNV: Fowler, Noll & Vo; constants from the
// published FNV parameters, as in Go's hash/fnv).
func hashFeature(name, value string) uint64 {
	const offset64, prime64 = 14695981039346656037, 1099511628211
	h := uint64(offset64)
	for i := 0; i < len(name); i++ {
		h ^= uint64(name[i])
		h *= prime64
	}
	h *= prime64 // the zero separator: h ^= 0 then multiply
	for i := 0; i < len(value); i++ {
		h ^= uint64(value[i])
		h *= prime64
	}
	return h
}
