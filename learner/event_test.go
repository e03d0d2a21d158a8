package learner

import (
	"errors"
	"strings"
	"testing"
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
