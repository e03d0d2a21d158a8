package learner

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"
)

// Limits on a single event. An event beyond any of them is rejected with
// ErrInvalidEvent: they bound the memory a hostile line can claim.
const (
	MaxEventBytes    = 1 << 20 // bytes of one encoded event
	MaxFeatures      = 1024    // features in one event
	MaxKeyBytes      = 256     // bytes of the key
	MaxNameBytes     = 256     // bytes of a feature name
	MaxStringBytes   = 1024    // bytes of a categorical value
	MaxAnswerIDBytes = 128     // bytes of an answer id (ServedAnswer)
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
//
// AnswerID names a prediction the service served (a predict answer's
// answer_id): the event is that answer's label, and the answer is scored
// against its target (served.go). LabelOnly marks an event that names an
// answer and has no "features" member at all: it labels the answer and
// trains nothing.
type Event struct {
	Time      int64
	HasTime   bool
	Key       string
	Features  []Feature
	Target    float64
	AnswerID  string
	LabelOnly bool
}

type wireEvent struct {
	Time     json.RawMessage            `json:"time"`
	Key      json.RawMessage            `json:"key"`
	Features map[string]json.RawMessage `json:"features"`
	Target   json.RawMessage            `json:"target"`
	AnswerID json.RawMessage            `json:"answer_id"`
}

// DecodeEvent parses one JSON event (DESIGN.md, "Event") into ev, reusing
// ev.Features' storage. Any problem — not JSON, a missing or non-finite target,
// a feature that is neither a number nor a string, a size past the limits,
// bytes that are not UTF-8, a member name given twice (two "key"s, two
// features of one name), U+FFFD in a key, feature name or categorical value
// (the mark of text that was not valid, so that two different byte strings
// never share a model) — is an error wrapping ErrInvalidEvent whose text
// says what is wrong.
func DecodeEvent(data []byte, ev *Event) error { return decodeEvent(data, ev, true) }

// DecodeRow parses a prediction row: an event whose target is optional and
// ignored.
func DecodeRow(data []byte, ev *Event) error { return decodeEvent(data, ev, false) }

func decodeEvent(data []byte, ev *Event, needTarget bool) error {
	return decodeWith(data, ev, needTarget, nil)
}

func decodeWith(data []byte, ev *Event, needTarget bool, keys *Keys) error {
	if len(data) <= MaxEventBytes {
		if ok, err := decodeFast(data, ev, needTarget, keys); ok {
			return err
		}
	}
	return decodeSlow(data, ev, needTarget)
}

// Keys interns the keys of the events one reader decodes (Keys.Decode), so
// that a key seen before costs no allocation: a stream names its keys over
// and over. It holds at most MaxInterned keys; later new keys are decoded as
// DecodeEvent does. Not safe for concurrent use: one per reading goroutine.
type Keys struct {
	m map[string]string
}

// MaxInterned bounds the keys a Keys holds.
const MaxInterned = 1 << 16

// Decode is DecodeEvent with the event's key interned.
func (k *Keys) Decode(data []byte, ev *Event) error { return decodeWith(data, ev, true, k) }

// key returns b as a string: the one held when b was seen before.
func (k *Keys) key(b []byte) string {
	if s, ok := k.m[string(b)]; ok {
		return s
	}
	s := string(b)
	if k.m == nil {
		k.m = map[string]string{}
	}
	if len(k.m) < MaxInterned {
		k.m[s] = s
	}
	return s
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
	if !utf8.Valid(data) {
		return invalid("not valid UTF-8 (at byte %d)", firstInvalidUTF8(data))
	}
	var w wireEvent
	if err := json.Unmarshal(data, &w); err != nil {
		return invalid("not valid JSON: %v", err)
	}
	if err := noDuplicateMembers(data); err != nil {
		return err
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
		if strings.ContainsRune(k, utf8.RuneError) {
			return invalid("key %q contains U+FFFD (an invalid escape or text that was not UTF-8)", truncate(k))
		}
		ev.Key = k
	}
	if !isAbsent(w.AnswerID) {
		var id string
		if err := json.Unmarshal(w.AnswerID, &id); err != nil {
			return invalid("answer_id must be a string")
		}
		if err := checkAnswerID(id); err != nil {
			return err
		}
		ev.AnswerID, ev.LabelOnly = id, w.Features == nil
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
		if strings.ContainsRune(name, utf8.RuneError) {
			return invalid("feature name %q contains U+FFFD (an invalid escape or text that was not UTF-8)", truncate(name))
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
			if strings.ContainsRune(f.Str, utf8.RuneError) {
				return invalid("feature %q: value contains U+FFFD (an invalid escape or text that was not UTF-8)", name)
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

// checkAnswerID refuses an answer id that is empty, too long or holds
// U+FFFD.
func checkAnswerID(id string) error {
	switch {
	case id == "":
		return invalid("answer_id is empty")
	case len(id) > MaxAnswerIDBytes:
		return invalid("answer_id is %d bytes, more than the limit of %d", len(id), MaxAnswerIDBytes)
	case strings.ContainsRune(id, utf8.RuneError):
		return invalid("answer_id %q contains U+FFFD (an invalid escape or text that was not UTF-8)", truncate(id))
	}
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
	if ev.AnswerID != "" {
		if err := checkAnswerID(ev.AnswerID); err != nil {
			return err
		}
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

// noDuplicateMembers refuses an event object that names a member twice —
// at the top level without regard to case, as encoding/json matches the
// fields, and among the features exactly — which a decoder would otherwise
// settle silently by keeping the last.
func noDuplicateMembers(data []byte) error {
	members := func(obj []byte, fold bool, where string) (map[string]json.RawMessage, error) {
		dec := json.NewDecoder(bytes.NewReader(obj))
		if _, err := dec.Token(); err != nil {
			return nil, invalid("not valid JSON: %v", err)
		}
		out := map[string]json.RawMessage{}
		for dec.More() {
			t, err := dec.Token()
			if err != nil {
				return nil, invalid("not valid JSON: %v", err)
			}
			name, _ := t.(string)
			k := name
			if fold {
				k = strings.ToLower(name)
			}
			if _, dup := out[k]; dup {
				return nil, invalid("%s %q appears twice", where, truncate(name))
			}
			var v json.RawMessage
			if err := dec.Decode(&v); err != nil {
				return nil, invalid("not valid JSON: %v", err)
			}
			out[k] = v
		}
		return out, nil
	}
	top, err := members(data, true, "member")
	if err != nil {
		return err
	}
	if f := bytes.TrimSpace(top["features"]); len(f) > 0 && f[0] == '{' {
		_, err = members(f, false, "feature")
	}
	return err
}

// firstInvalidUTF8 returns the offset of the first byte of b that is not
// part of valid UTF-8.
func firstInvalidUTF8(b []byte) int {
	for i := 0; i < len(b); {
		r, n := utf8.DecodeRune(b[i:])
		if r == utf8.RuneError && n <= 1 {
			return i
		}
		i += n
	}
	return len(b)
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
