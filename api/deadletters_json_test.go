package api

import (
	"encoding/json"
	"math/rand/v2"
	"testing"

	"tidemark/learner"
)

// TestDeadLetterLineIsWhatJSONWrites: the dead-letter line is built by hand
// for speed; encoding/json (the standard library) is the reference it must
// equal byte for byte, for hostile strings too (control characters, HTML
// characters, U+2028, invalid UTF-8).
func TestDeadLetterLineIsWhatJSONWrites(t *testing.T) {
	cases := []string{"", "plain", `quote " backslash \ slash /`, "<script>&</script>", "tab\tnew\nline\rcr\x00\x1f\x7f",
		"line\u2028para\u2029", "bad \xff\xfe utf-8 \xc3", "émoji 🌊 and ü", "\xed\xa0\x80 surrogate"}
	rng := rand.New(rand.NewPCG(3, 4))
	for i := 0; i < 2000; i++ {
		b := make([]byte, rng.IntN(40))
		for j := range b {
			b[j] = byte(rng.IntN(256))
		}
		cases = append(cases, string(b))
	}
	for _, c := range cases {
		pos := learner.Position{Partition: int32(len(c) % 3), Offset: int64(len(c)) * 1e9}
		want, _ := json.Marshal(deadLetter{Position: pos, Reason: "reason " + c, Event: c})
		want = append(want, '\n')
		if got := appendDeadLetter(nil, pos, "reason "+c, []byte(c)); string(got) != string(want) {
			t.Fatalf("%q: wrote %s, encoding/json %s", c, got, want)
		}
	}
}
