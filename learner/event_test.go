package learner

import (
	"errors"
	"math/rand/v2"
	"strings"
	"testing"
	"time"
)

// TestDecodeEventRefusesAmbiguousText: input that a JSON decoder would
// settle silently — invalid UTF-8 turned into U+FFFD (so that different keys
// share a model), a member given twice (the last one kept) — is refused with
// a reason (issue 11, hole 7).
func TestDecodeEventRefusesAmbiguousText(t *testing.T) {
	for _, tc := range []struct {
		name, line, want string
	}{
		{"invalid UTF-8 in the key", "{\"key\":\"room-\xff\",\"features\":{\"a\":1},\"target\":1}", "not valid UTF-8 (at byte 13)"},
		{"invalid UTF-8 in a value", "{\"key\":\"r\",\"features\":{\"a\":\"x\xc3\"},\"target\":1}", "not valid UTF-8"},
		{"lone surrogate escape in the key", `{"key":"room-\ud800","features":{"a":1},"target":1}`, "U+FFFD"},
		{"U+FFFD in a feature name", `{"key":"r","features":{"a\ufffd":1},"target":1}`, "U+FFFD"},
		{"two keys", `{"key":"a","key":"b","features":{"x":1},"target":1}`, `member "key" appears twice`},
		{"two keys of another case", `{"key":"a","Key":"b","features":{"x":1},"target":1}`, `member "Key" appears twice`},
		{"two targets", `{"target":1,"features":{"x":1},"target":2}`, `member "target" appears twice`},
		{"two features of one name", `{"features":{"x":1,"y":2,"x":3},"target":1}`, `feature "x" appears twice`},
	} {
		var ev Event
		err := DecodeEvent([]byte(tc.line), &ev)
		if !errors.Is(err, ErrInvalidEvent) || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%s: %v, want ErrInvalidEvent saying %q", tc.name, err, tc.want)
		}
	}
	// Non-ASCII text that is valid is fine, and keeps its bytes.
	var ev Event
	if err := DecodeEvent([]byte(`{"key":"salle-é","features":{"zone":"nord-ü"},"target":1}`), &ev); err != nil || ev.Key != "salle-é" {
		t.Errorf("valid UTF-8: %v %q", err, ev.Key)
	}
}

// TestParseTimeAgreesWithTimeParse: the decoder's own parser of the
// canonical RFC 3339 forms gives time.Parse(time.RFC3339Nano)'s result for
// every text it accepts, and accepts nothing time.Parse refuses — over
// random instants written in each form, and edge cases worked by hand
// (leap days, the last second of a day, offsets, fractions).
func TestParseTimeAgreesWithTimeParse(t *testing.T) {
	check := func(s string) {
		t.Helper()
		ns, ok := parseTime([]byte(s))
		want, err := time.Parse(time.RFC3339Nano, s)
		switch {
		case ok && err != nil:
			t.Errorf("%q: parsed to %d, time.Parse refuses it: %v", s, ns, err)
		case ok && ns != want.UnixNano():
			t.Errorf("%q: %d, time.Parse %d", s, ns, want.UnixNano())
		}
	}
	for _, s := range []string{
		"2026-03-01T00:05:00Z", "2024-02-29T23:59:59Z", "2023-02-29T00:00:00Z", "2100-02-29T00:00:00Z", "2000-02-29T12:00:00Z",
		"2026-12-31T23:59:59.999999999Z", "2026-01-01T00:00:00.5Z", "2026-01-01T00:00:00.Z", "2026-01-01T00:00:00.1234567890Z",
		"2026-06-30T24:00:00Z", "2026-06-31T00:00:00Z", "2026-13-01T00:00:00Z", "2026-00-10T00:00:00Z", "2026-06-10T10:60:00Z",
		"2026-06-10T10:00:60Z", "2026-06-10T10:00:00+02:00", "2026-06-10T10:00:00-11:30", "2026-06-10T10:00:00+24:00",
		"2026-06-10T10:00:00-00:00", "2026-06-10t10:00:00z", "2026-06-10 10:00:00Z", "1970-01-01T00:00:00Z", "1969-12-31T23:59:59.9Z",
		"1700-03-01T00:00:00Z", "0000-01-01T00:00:00Z", "9999-12-31T23:59:59Z", "2026-06-10T10:00:00+0200", "2026-06-10T10:00:00",
	} {
		check(s)
	}
	rng := rand.New(rand.NewPCG(8, 8))
	zones := []*time.Location{time.UTC, time.FixedZone("", 5*3600+30*60), time.FixedZone("", -8*3600)}
	for range 100_000 {
		tm := time.Unix(rng.Int64N(8_000_000_000)-2_000_000_000, rng.Int64N(1e9)).In(zones[rng.IntN(len(zones))])
		for _, layout := range []string{time.RFC3339, time.RFC3339Nano, "2006-01-02T15:04:05.000Z07:00"} {
			s := tm.Format(layout)
			check(s)
			if _, ok := parseTime([]byte(s)); !ok {
				t.Fatalf("%q: the canonical form was not parsed", s)
			}
		}
	}
}
