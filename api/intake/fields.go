package intake

import (
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"time"
)

// The fields of a source's events (Fields): which are an event's time, key
// and target, how times are written, which are features. CSV and Parquet
// histories read their columns by it (csv.go, parquet.go); JSON sources are
// rewritten by it (mapping.go).

// Fields says which fields of a history's rows are an event's time, key and
// target, how the time is written, and how the other fields are taken:
// every one a feature, but those ignored; a field named in Categorical is a
// string however it looks, one in Numeric must be a number.
type Fields struct {
	Time, Key, Target string // default "time", "key", "target"; in JSON, dotted paths into nested objects
	TimeFormat        string // TimeRFC3339 (default), TimeUnixS, TimeUnixMS, TimeUnixUS, or a Go layout
	Zone              *time.Location
	Ignore            []string
	Categorical       []string
	Numeric           []string
	// JSON sources only (mapping.go): objects whose members are features,
	// and features renamed (source name → feature name).
	FeaturesFrom []string
	Rename       map[string]string
}

// Time formats.
const (
	TimeRFC3339 = "rfc3339"
	TimeUnixS   = "unix_s"
	TimeUnixMS  = "unix_ms"
	TimeUnixUS  = "unix_us"
)

func (f Fields) withDefaults() Fields {
	if f.Time == "" {
		f.Time = "time"
	}
	if f.Key == "" {
		f.Key = "key"
	}
	if f.Target == "" {
		f.Target = "target"
	}
	if f.TimeFormat == "" {
		f.TimeFormat = TimeRFC3339
	}
	if f.Zone == nil {
		f.Zone = time.UTC
	}
	return f
}

// Validate lists every problem of f.
func (f Fields) Validate() error {
	f = f.withDefaults()
	var errs []error
	if f.Time == f.Key || f.Time == f.Target || f.Key == f.Target {
		errs = append(errs, fmt.Errorf("the time, key and target fields must differ (%q, %q, %q)", f.Time, f.Key, f.Target))
	}
	switch f.TimeFormat {
	case TimeRFC3339, TimeUnixS, TimeUnixMS, TimeUnixUS:
	default:
		if !strings.ContainsAny(f.TimeFormat, "0123456789") {
			errs = append(errs, fmt.Errorf("time format %q: want rfc3339, unix_s, unix_ms, unix_us or a layout such as \"2006-01-02 15:04:05\"", f.TimeFormat))
		}
	}
	for _, c := range f.Categorical {
		if slices.Contains(f.Numeric, c) {
			errs = append(errs, fmt.Errorf("field %q is declared both categorical and numeric", c))
		}
	}
	errs = append(errs, f.validateMapping()...)
	return errors.Join(errs...)
}

// parseTime reads a time written in format (see Fields.TimeFormat); times
// written without a zone are in zone.
func parseTime(v, format string, zone *time.Location) (time.Time, error) {
	unit := int64(0)
	switch format {
	case TimeRFC3339:
		t, err := time.Parse(time.RFC3339Nano, v)
		if err != nil {
			return t, fmt.Errorf("time %q is not RFC 3339", v)
		}
		return t, nil
	case TimeUnixS:
		unit = 1e9
	case TimeUnixMS:
		unit = 1e6
	case TimeUnixUS:
		unit = 1e3
	default:
		t, err := time.ParseInLocation(format, v, zone)
		if err != nil {
			return t, fmt.Errorf("time %q does not match the layout %q", v, format)
		}
		return t, nil
	}
	// Epoch times as integers or exact decimals (a fraction down to the
	// nanosecond).
	digits := map[int64]int{1e9: 9, 1e6: 6, 1e3: 3}[unit]
	what := map[string]string{TimeUnixS: "seconds", TimeUnixMS: "milliseconds", TimeUnixUS: "microseconds"}[format]
	whole, frac, _ := strings.Cut(v, ".")
	n, err := strconv.ParseInt(whole, 10, 64)
	if err != nil || len(frac) > digits || strings.HasPrefix(whole, "+") {
		return time.Time{}, fmt.Errorf("time %q is not a number of %s since 1970 (to the nanosecond at most)", v, what)
	}
	var f int64
	if frac != "" {
		if f, err = strconv.ParseInt(frac+strings.Repeat("0", digits-len(frac)), 10, 64); err != nil || f < 0 {
			return time.Time{}, fmt.Errorf("time %q is not a number of %s since 1970", v, what)
		}
	}
	if n > (1<<62)/unit || n < -(1<<62)/unit {
		return time.Time{}, fmt.Errorf("time %q is out of range", v)
	}
	ns := n * unit
	if strings.HasPrefix(whole, "-") {
		ns -= f
	} else {
		ns += f
	}
	return time.Unix(0, ns).UTC(), nil
}
