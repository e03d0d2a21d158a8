package api

import "testing"

// TestPlainDropsPackagePrefixes: messages people read carry no package
// prefixes, wherever the wrapped errors put them (the two messages the
// operator's report quoted, written out here).
func TestPlainDropsPackagePrefixes(t *testing.T) {
	for in, want := range map[string]string{
		"learner: invalid event: line 3: target is missing":          "invalid event: line 3: target is missing",
		"checkpoint: corrupt: checkpoint: ckpt-7.tdmk: CRC mismatch": "corrupt: ckpt-7.tdmk: CRC mismatch",
		"kafka: no brokers given (--kafka-brokers host:port,...)":    "kafka: no brokers given (--kafka-brokers host:port,...)",
		"a; persist: cannot resume: other learners":                  "a; cannot resume: other learners",
		"nothing to drop: learner k=5":                               "nothing to drop: learner k=5",
	} {
		if got := Plain(in); got != want {
			t.Errorf("Plain(%q) = %q, want %q", in, got, want)
		}
	}
}
