package learner

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"sort"
	"strconv"
	"time"
)

// Limits on a single event. An event beyond any of them is rejected with
// ErrInvalidEvent: they bound the memory a hostile line can claim.
const (
	MaxEventBytes    = 1 << 20 // bytes of one encoded event
	MaxFeatures      = 1024    // features in one event
	MaxKeyBytes      = 256     // bytes of the key
	MaxNameBytes     = 256     // bytes of a feature name
	MaxStringBytes   = 1024    // bytes of a categorical value
	MaxAbsValue      = 1e50    // magnitude of any number; beyond it squares overflow the learners
	maxTimeTextBytes = 64
)

// Feature is one named input of an event: a number, or a string for a
// categorical feature.
type Feature struct {
	Name  string
	Num   float64
	Str   string
	IsStr bool
}

// Event is one labelled observation. Features are sorted by name, names
// unique. Time is Unix nanoseconds, meaningful only when HasTime is set.
type Event struct {
	Time     int64
	HasTime  bool
	Key      string
	Features []Feature
	Target   float64
}

type wireEvent struct {
	Time     json.RawMessage            `json:"time"`
	Key      json.RawMessage            `json:"key"`
	Features map[string]json.RawMessage `json:"features"`
	Target   json.RawMessage            `json:"target"`
}

// DecodeEvent parses one JSON event (DESIGN.md, "Event") into ev, reusing
// ev.Features' storage. Any problem — not JSON, a missing or non-finite target,
// a feature that is neither a number nor a string, a size past the limits — is
// an error wrapping ErrInvalidEvent whose text says what is wrong.
func DecodeEvent(data []byte, ev *Event) error { return decodeEvent(data, ev, true) }

// DecodeRow parses a prediction row: an event whose target is optional and
// ignored.
func DecodeRow(data []byte, ev *Event) error { return decodeEvent(data, ev, false) }

func decodeEvent(data []byte, ev *Event, needTarget bool) error {
	if len(data) <= MaxEventBytes {
		if ok, err := decodeFast(data, ev, needTarget); ok {
			return err
		}
	}
	return decodeSlow(data, ev, needTarget)
}

// decodeSlow is the reference decoder, built on encoding/json; decodeFast
// handles the canonical shape and hands anything else to it.
func decodeSlow(data []byte, ev *Event, needTarget bool) error {
	if len(data) > MaxEventBytes {
		return invalid("event is %d bytes, more than the limit of %d", len(data), MaxEventBytes)
	}
	data = bytes.TrimSpace(data)
	if len(data) == 0 || data[0] != '{' {
		return invalid("not a JSON object")
	}
	var w wireEvent
	if err := json.Unmarshal(data, &w); err != nil {
		return invalid("not valid JSON: %v", err)
	}
	*ev = Event{Features: ev.Features[:0]}
	if needTarget || !isAbsent(w.Target) {
		if isAbsent(w.Target) {
			return invalid("target is missing")
		}
		y, err := number(w.Target)
		if err != nil {
			return invalid("target: %v", err)
		}
		ev.Target = y
	}
	if !isAbsent(w.Key) {
		var k string
		if err := json.Unmarshal(w.Key, &k); err != nil {
			return invalid("key must be a string")
		}
		if len(k) > MaxKeyBytes {
			return invalid("key is %d bytes, more than the limit of %d", len(k), MaxKeyBytes)
		}
		ev.Key = k
	}
	if !isAbsent(w.Time) {
		var s string
		if err := json.Unmarshal(w.Time, &s); err != nil || len(s) > maxTimeTextBytes {
			return invalid("time must be an RFC 3339 string")
		}
		t, err := time.Parse(time.RFC3339Nano, s)
		if err != nil {
			return invalid("time %q is not RFC 3339", s)
		}
		ev.Time, ev.HasTime = t.UnixNano(), true
	}
	if len(w.Features) > MaxFeatures {
		return invalid("%d features, more than the limit of %d", len(w.Features), MaxFeatures)
	}
	for name, raw := range w.Features {
		if name == "" || len(name) > MaxNameBytes {
			return invalid("feature name %q is empty or longer than %d bytes", truncate(name), MaxNameBytes)
		}
		f := Feature{Name: name}
		raw = bytes.TrimSpace(raw)
		switch {
		case len(raw) > 0 && raw[0] == '"':
			if err := json.Unmarshal(raw, &f.Str); err != nil {
				return invalid("feature %q: %v", name, err)
			}
			if len(f.Str) > MaxStringBytes {
				return invalid("feature %q: value longer than %d bytes", name, MaxStringBytes)
			}
			f.IsStr = true
		default:
			v, err := number(raw)
			if err != nil {
				return invalid("feature %q: %v", name, err)
			}
			f.Num = v
		}
		ev.Features = append(ev.Features, f)
	}
	sort.Slice(ev.Features, func(i, j int) bool { return ev.Features[i].Name < ev.Features[j].Name })
	return nil
}

// ValidateEvent checks an event built in code (not decoded) against the same
// rules as DecodeEvent, and sorts its features.
func ValidateEvent(ev *Event) error {
	if !finite(ev.Target) {
		return invalid("target is not a finite number of magnitude at most %g", MaxAbsValue)
	}
	if len(ev.Key) > MaxKeyBytes {
		return invalid("key is %d bytes, more than the limit of %d", len(ev.Key), MaxKeyBytes)
	}
	if len(ev.Features) > MaxFeatures {
		return invalid("%d features, more than the limit of %d", len(ev.Features), MaxFeatures)
	}
	sort.Slice(ev.Features, func(i, j int) bool { return ev.Features[i].Name < ev.Features[j].Name })
	for i, f := range ev.Features {
		if f.Name == "" || len(f.Name) > MaxNameBytes {
			return invalid("feature name %q is empty or longer than %d bytes", truncate(f.Name), MaxNameBytes)
		}
		if i > 0 && ev.Features[i-1].Name == f.Name {
			return invalid("feature %q appears twice", f.Name)
		}
		if !f.IsStr && !finite(f.Num) {
			return invalid("feature %q: not a finite number of magnitude at most %g", f.Name, MaxAbsValue)
		}
		if f.IsStr && len(f.Str) > MaxStringBytes {
			return invalid("feature %q: value longer than %d bytes", f.Name, MaxStringBytes)
		}
	}
	return nil
}

func finite(v float64) bool { return !math.IsNaN(v) && math.Abs(v) <= MaxAbsValue }

func isAbsent(raw json.RawMessage) bool {
	raw = bytes.TrimSpace(raw)
	return len(raw) == 0 || string(raw) == "null"
}

func number(raw json.RawMessage) (float64, error) {
	raw = bytes.TrimSpace(raw)
	if len(raw) == 0 || !(raw[0] == '-' || (raw[0] >= '0' && raw[0] <= '9')) {
		return 0, fmt.Errorf("want a number, got %s", truncate(string(raw)))
	}
	v, err := strconv.ParseFloat(string(raw), 64)
	if err != nil || !finite(v) {
		return 0, fmt.Errorf("%s is not a finite number of magnitude at most %g", truncate(string(raw)), MaxAbsValue)
	}
	return v, nil
}

func truncate(s string) string {
	if len(s) > 40 {
		return s[:40] + "…"
	}
	return s
}

func invalid(format string, args ...any) error {
	return fmt.Errorf("%w: %s", ErrInvalidEvent, fmt.Sprintf(format, args...))
}
