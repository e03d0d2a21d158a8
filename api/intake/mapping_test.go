package intake

import (
	"encoding/json"
	"strings"
	"testing"
	"time"

	"tidemark/learner"
)

// TestMapperRewritesByHand: each rule of a mapping, on messages written out
// here with the canonical events they must become.
func TestMapperRewritesByHand(t *testing.T) {
	t0 := time.Date(2026, 3, 2, 14, 0, 0, 0, time.UTC)
	for _, c := range []struct {
		name string
		f    Fields
		in   string
		want learner.Event
		err  string
	}{
		{name: "nested paths, an object of features, other scalars, ignore",
			f:    Fields{Time: "meta.ts", Key: "meta.dev", Target: "kwh", FeaturesFrom: []string{"v"}, Ignore: []string{"note"}},
			in:   `{"meta":{"ts":"2026-03-02T15:00:00+01:00","dev":"a"},"v":{"x":1,"y":"s"},"kwh":2,"extra":3,"note":"n","list":[1]}`,
			want: learner.Event{Time: t0.UnixNano(), HasTime: true, Key: "a", Target: 2, Features: []learner.Feature{{Name: "extra", Num: 3}, {Name: "x", Num: 1}, {Name: "y", Str: "s", IsStr: true}}}},
		{name: "rename, a numeric key, epoch seconds as text",
			f:    Fields{Time: "t", TimeFormat: TimeUnixS, Key: "id", Rename: map[string]string{"temp": "outdoor_c"}},
			in:   `{"t":"1772460000","id":17,"temp":21.5,"target":1}`,
			want: learner.Event{Time: t0.UnixNano(), HasTime: true, Key: "17", Target: 1, Features: []learner.Feature{{Name: "outdoor_c", Num: 21.5}}}},
		{name: "declared categorical and numeric",
			f:    Fields{Key: "k", Categorical: []string{"zone"}, Numeric: []string{"temp"}, TimeFormat: TimeUnixMS},
			in:   `{"zone":12,"temp":"21.5","target":3,"answer_id":"a-1"}`,
			want: learner.Event{Target: 3, AnswerID: "a-1", Features: []learner.Feature{{Name: "temp", Num: 21.5}, {Name: "zone", Str: "12", IsStr: true}}}},
		{name: "a number declared numeric that is not", f: Fields{Numeric: []string{"temp"}, Key: "k"}, in: `{"temp":"warm","target":1}`, err: "not a number"},
		{name: "two fields become one feature", f: Fields{Key: "k", Rename: map[string]string{"a": "b"}}, in: `{"a":1,"b":2,"target":1}`, err: `feature "b"`},
		{name: "not an object", f: Fields{Key: "k"}, in: `[1,2]`, err: "not a JSON object"},
		{name: "a time that does not parse", f: Fields{Time: "ts", TimeFormat: TimeUnixMS}, in: `{"ts":"soon","target":1}`, err: "soon"},
	} {
		m, err := NewMapper(c.f)
		if err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		out, err := m.Canonical([]byte(c.in))
		if c.err != "" {
			if err == nil || !strings.Contains(err.Error(), c.err) {
				t.Errorf("%s: %s, %v; want an error naming %q", c.name, out, err, c.err)
			}
			continue
		}
		if err != nil {
			t.Errorf("%s: %v", c.name, err)
			continue
		}
		var ev learner.Event
		if err := learner.DecodeEvent(out, &ev); err != nil {
			t.Errorf("%s: %s does not decode: %v", c.name, out, err)
			continue
		}
		g, _ := json.Marshal(ev)
		w, _ := json.Marshal(c.want)
		if string(g) != string(w) {
			t.Errorf("%s:\n got %s (%s)\nwant %s", c.name, g, out, w)
		}
	}
	if (Fields{}).Mapped() || !(Fields{Time: "ts"}).Mapped() {
		t.Error("Mapped: the defaults map nothing, another time field does")
	}
}

// FuzzMapping: whatever the message, a mapping of nested paths, an object
// of features and renames never panics, and what it writes is JSON the
// event decoder takes or refuses with a reason.
func FuzzMapping(f *testing.F) {
	for _, s := range []string{`{"meta":{"ts":1772460000000,"dev":"a"},"readings":{"x":1},"kwh":2}`, `{"kwh":"x"}`, `{}`, `[]`, `{"readings":5}`,
		`{"meta":{"ts":"x"}}`, `{"a":1,"b":2}`, `{"meta":{"dev":{"x":1}}}`, "{\"readings\":{\"\xff\":1},\"kwh\":1}"} {
		f.Add([]byte(s))
	}
	m, err := NewMapper(Fields{Time: "meta.ts", TimeFormat: TimeUnixMS, Key: "meta.dev", Target: "kwh", FeaturesFrom: []string{"readings"}, Rename: map[string]string{"a": "b"}})
	if err != nil {
		f.Fatal(err)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		out, err := m.Canonical(data)
		if err != nil {
			return
		}
		if !json.Valid(out) {
			t.Fatalf("%q became %s, not JSON", data, out)
		}
		var ev learner.Event
		learner.DecodeEvent(out, &ev)
	})
}
