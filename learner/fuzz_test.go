package learner

import (
	"bytes"
	"os"
	"reflect"
	"testing"

	"tidemark/bench/synth"
)

// FuzzDecodeEvent checks the fast decoder against the reference one on
// arbitrary bytes: whenever the fast path accepts an input, the reference
// decoder must give the same event and the same verdict; and no input may
// panic either. Seeds: scenario lines and hostile variants.
func FuzzDecodeEvent(f *testing.F) {
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: 1, Seed: 1})
	for i, l := range bytes.Split(buf.Bytes(), []byte("\n")) {
		if i%97 == 0 {
			f.Add(l)
		}
	}
	if hostile, err := os.ReadFile("../testdata/hostile-events.ndjson"); err == nil {
		for _, l := range bytes.Split(hostile, []byte("\n")) {
			f.Add(l)
		}
	}
	for _, s := range []string{
		`{}`, `{"target":1}`, `{"target":-0.5e-3,"key":"k","time":"2026-03-01T00:00:00.5Z","features":{"a":1,"b":"x"}}`,
		`{"target":1,"features":{"a":1,"a":2}}`, `{"Target":1}`, `{"target":1e999}`, `{"target":01}`, `{"target":"1"}`,
		`{"target":1,"features":{"é":1}}`, `{"target":1,"key":"a\"b"}`, `{"target":1,"time":null}`, `{"target":1} x`,
		` {"target": 1 , "features" : { } } `, `{"target":1,"extra":[1,2]}`, `{"target":-}`, `{"target":1.}`, `{"target":1e}`,
		`{"answer_id":"a-1","target":2}`, `{"answer_id":"","target":1}`, `{"answer_id":"x","target":1,"features":{}}`, `{"answer_id":7,"target":1}`,
	} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		for _, needTarget := range []bool{true, false} {
			var fast, slow Event
			ok, ferr := decodeFast(data, &fast, needTarget, &fuzzKeys)
			serr := decodeSlow(data, &slow, needTarget)
			if !ok {
				continue
			}
			if (ferr == nil) != (serr == nil) {
				t.Fatalf("%q (target needed %v): fast error %v, reference %v", data, needTarget, ferr, serr)
			}
			if serr == nil && !reflect.DeepEqual(normalise(fast), normalise(slow)) {
				t.Fatalf("%q: fast %+v, reference %+v", data, fast, slow)
			}
		}
	})
}

func normalise(e Event) Event {
	if len(e.Features) == 0 {
		e.Features = nil
	}
	return e
}

// FuzzParseSpec: no spec text panics; every error wraps ErrInvalidSpec.
func FuzzParseSpec(f *testing.F) {
	for _, s := range []string{"knn:k=10,window=2000", "rls:half_life=12h,degree=2", "sliding-rls:window=7d", "mean", "knn:k=1..30",
		"rls:forget=0.99|0.995|1", "knn:k=", ":", "rls:p0=inf,intercept=false", "knn:window=-1h"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		specs, err := ExpandSpec(s)
		if err == nil {
			for _, sp := range specs {
				_ = sp.Canonical()
			}
		}
	})
}

func TestFastDecoderTakesTheCanonicalShape(t *testing.T) {
	var ev Event
	line := []byte(`{"time":"2026-03-02T14:00:00Z","key":"room-b","features":{"outdoor_c":21.5,"door_min":3,"shift":"night"},"target":41.7}`)
	if ok, err := decodeFast(line, &ev, true, nil); !ok || err != nil {
		t.Fatalf("the canonical event took the slow path (ok %v, err %v)", ok, err)
	}
	if allocs := testing.AllocsPerRun(100, func() { decodeFast(line, &ev, true, nil) }); allocs > 6 {
		t.Errorf("%v allocations per canonical event, want at most 6 (names and the string value)", allocs)
	}
}

// fuzzKeys interns the keys FuzzDecodeEvent's fast decodes meet, so that
// interning is held to the reference decoder too.
var fuzzKeys Keys
