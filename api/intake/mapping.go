package intake

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"sort"
	"strings"
	"time"
)

// Field mapping of JSON events (NDJSON histories, the journal, Kafka
// messages): Fields says where in a message its time, key and target are —
// a name, or a dotted path into nested objects ("meta.ts") — how the time is
// written, which objects hold features (every member of each is one), how
// features are renamed, and which fields are ignored. A message is read as
// JSON and rewritten as the canonical event (DESIGN.md, "Event"), which the
// event decoder then reads as it reads any: so a mapped source is refused,
// scored and checkpointed exactly as the same events written canonically.
// Without a mapping (the defaults) messages are read as they are.
//
// The features of a message are the members of each FeaturesFrom object
// (default: "features", when the message has one) and every other top-level
// field that is a number or a string and is not the time, the key, the
// target, "answer_id" or ignored. Rename maps a source name (top-level, or a
// member of a features object) to a feature's name. Categorical and Numeric
// name features (after renaming) whose values are text however they look,
// or must be numbers.

// Mapped reports whether f changes anything for a JSON source.
func (f Fields) Mapped() bool {
	d := f.withDefaults()
	return d.Time != "time" || d.Key != "key" || d.Target != "target" || d.TimeFormat != TimeRFC3339 || d.Zone != time.UTC ||
		len(f.Ignore) > 0 || len(f.FeaturesFrom) > 0 || len(f.Rename) > 0
}

// validateMapping lists the problems of f as a JSON mapping.
func (f Fields) validateMapping() []error {
	var errs []error
	for _, p := range append([]string{f.Time, f.Key, f.Target}, f.FeaturesFrom...) {
		if p != "" && (strings.HasPrefix(p, ".") || strings.HasSuffix(p, ".") || strings.Contains(p, "..")) {
			errs = append(errs, fmt.Errorf("field path %q: want names joined by single dots, e.g. meta.ts", p))
		}
	}
	to := map[string]string{}
	for src, dst := range f.Rename {
		if src == "" || dst == "" {
			errs = append(errs, fmt.Errorf("rename %q to %q: both names are needed", src, dst))
		}
		if prev, ok := to[dst]; ok {
			errs = append(errs, fmt.Errorf("rename: %q and %q both become %q", prev, src, dst))
		}
		to[dst] = src
	}
	return errs
}

// Mapper rewrites JSON events by a mapping (Fields). It is safe for
// concurrent use (a Kafka source reads its partitions on goroutines of
// their own): it keeps nothing between calls.
type Mapper struct {
	f Fields
}

// NewMapper returns a mapper for f, or the problems of f, every one.
func NewMapper(f Fields) (*Mapper, error) {
	if err := f.Validate(); err != nil {
		return nil, err
	}
	return &Mapper{f: f.withDefaults()}, nil
}

// Canonical rewrites the JSON event src as the canonical event, in a new
// slice. An event the mapping cannot read (not a JSON
// object, a time that does not parse, a field of the wrong kind) is an error
// that says why.
func (m *Mapper) Canonical(src []byte) ([]byte, error) {
	d := json.NewDecoder(bytes.NewReader(src))
	d.UseNumber()
	var obj map[string]any
	if err := d.Decode(&obj); err != nil || obj == nil {
		return nil, errors.New("not a JSON object")
	}
	if d.More() {
		return nil, errors.New("data after the JSON object")
	}
	f := &m.f
	b := make([]byte, 1, len(src)+32)
	b[0] = '{'
	if v, ok := lookup(obj, f.Time); ok && v != nil {
		text, err := timeText(v)
		if err != nil {
			return nil, err
		}
		t, err := parseTime(text, f.TimeFormat, f.Zone)
		if err != nil {
			return nil, err
		}
		b = append(b, `"time":"`...)
		b = t.AppendFormat(b, time.RFC3339Nano)
		b = append(b, `",`...)
	}
	if v, ok := lookup(obj, f.Key); ok && v != nil {
		switch k := v.(type) {
		case string:
			b = append(b, `"key":`...)
			b = appendJSONString(b, k)
			b = append(b, ',')
		case json.Number:
			b = append(b, `"key":`...)
			b = appendJSONString(b, k.String())
			b = append(b, ',')
		default:
			return nil, fmt.Errorf("key %q: want a string or a number", f.Key)
		}
	}
	if v, ok := obj["answer_id"]; ok {
		if s, ok := v.(string); ok {
			b = append(b, `"answer_id":`...)
			b = appendJSONString(b, s)
			b = append(b, ',')
		}
	}
	// Features: the members of the feature objects, then the other
	// top-level fields; a name met twice is refused.
	type feat struct {
		name string
		v    any
	}
	var feats []feat
	from := f.FeaturesFrom
	if len(from) == 0 {
		if _, ok := obj["features"].(map[string]any); ok {
			from = []string{"features"}
		}
	}
	tops := map[string]bool{firstName(f.Time): true, firstName(f.Key): true, firstName(f.Target): true, "answer_id": true}
	for _, p := range from {
		tops[firstName(p)] = true
		v, ok := lookup(obj, p)
		if !ok {
			continue
		}
		o, ok := v.(map[string]any)
		if !ok {
			return nil, fmt.Errorf("%q: want an object of features", p)
		}
		for name, fv := range o {
			if slices.Contains(f.Ignore, p+"."+name) || slices.Contains(f.Ignore, name) {
				continue
			}
			feats = append(feats, feat{m.rename(name), fv})
		}
	}
	for name, v := range obj {
		if tops[name] || slices.Contains(f.Ignore, name) {
			continue
		}
		switch v.(type) {
		case string, json.Number:
			feats = append(feats, feat{m.rename(name), v})
		}
	}
	sort.Slice(feats, func(i, j int) bool { return feats[i].name < feats[j].name })
	b = append(b, `"features":{`...)
	for i, ft := range feats {
		if i > 0 {
			if feats[i-1].name == ft.name {
				return nil, fmt.Errorf("two fields become the feature %q", ft.name)
			}
			b = append(b, ',')
		}
		b = appendJSONString(b, ft.name)
		b = append(b, ':')
		switch v := ft.v.(type) {
		case json.Number:
			if slices.Contains(f.Categorical, ft.name) {
				b = appendJSONString(b, v.String())
			} else {
				b = append(b, v.String()...)
			}
		case string:
			if slices.Contains(f.Numeric, ft.name) {
				if !isJSONNumber(v) {
					return nil, fmt.Errorf("feature %q: %q is not a number", ft.name, v)
				}
				b = append(b, v...)
			} else {
				b = appendJSONString(b, v)
			}
		case nil:
			return nil, fmt.Errorf("feature %q is null", ft.name)
		default:
			return nil, fmt.Errorf("feature %q: want a number or a string", ft.name)
		}
	}
	b = append(b, '}')
	if v, ok := lookup(obj, f.Target); ok && v != nil {
		b = append(b, `,"target":`...)
		switch t := v.(type) {
		case json.Number:
			b = append(b, t.String()...)
		case string:
			if isJSONNumber(t) {
				b = append(b, t...)
			} else {
				b = appendJSONString(b, t) // refused by the decoder as not a number
			}
		default:
			b = append(b, `"not a number"`...)
		}
	}
	b = append(b, '}')
	return b, nil
}

func (m *Mapper) rename(name string) string {
	if to, ok := m.f.Rename[name]; ok {
		return to
	}
	return name
}

// lookup returns the value at a dotted path of obj.
func lookup(obj map[string]any, path string) (any, bool) {
	if v, ok := obj[path]; ok {
		return v, true // a name with dots in it, as it is
	}
	cur := any(obj)
	for _, part := range strings.Split(path, ".") {
		o, ok := cur.(map[string]any)
		if !ok {
			return nil, false
		}
		if cur, ok = o[part]; !ok {
			return nil, false
		}
	}
	return cur, true
}

func firstName(path string) string {
	name, _, _ := strings.Cut(path, ".")
	return name
}

// timeText is a time value as text: a string, or a number's digits.
func timeText(v any) (string, error) {
	switch t := v.(type) {
	case string:
		return t, nil
	case json.Number:
		return t.String(), nil
	}
	return "", errors.New("time: want a string or a number")
}
