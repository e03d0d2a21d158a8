package synth

import (
	"bytes"
	"crypto/sha256"
	"strings"
	"testing"

	"tidemark/learner"
)

func TestSameSeedSameBytes(t *testing.T) {
	var a, b, c bytes.Buffer
	Write(&a, Config{Days: 2, Seed: 5})
	Write(&b, Config{Days: 2, Seed: 5})
	Write(&c, Config{Days: 2, Seed: 6})
	if sha256.Sum256(a.Bytes()) != sha256.Sum256(b.Bytes()) {
		t.Error("same seed, different bytes")
	}
	if bytes.Equal(a.Bytes(), c.Bytes()) {
		t.Error("different seeds, same bytes")
	}
}

func TestScenarioShape(t *testing.T) {
	var buf bytes.Buffer
	n, err := Write(&buf, Config{Days: 4})
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSuffix(buf.String(), "\n"), "\n")
	if len(lines) != n || n != 4*288*3+5 {
		t.Fatalf("%d lines (reported %d), want %d readings and 5 malformed", len(lines), n, 4*288*3)
	}
	bad, stuck := 0, 0
	var ev learner.Event
	for _, l := range lines {
		if err := learner.DecodeEvent([]byte(l), &ev); err != nil {
			bad++
			continue
		}
		if len(ev.Features) != 3 || ev.Key == "" || !ev.HasTime {
			t.Fatalf("odd event %s", l)
		}
		if ev.Features[1].Num == 9.5 {
			stuck++
		}
	}
	if bad != 5 {
		t.Errorf("%d malformed lines, want 5", bad)
	}
	if stuck < 6*12*3 {
		t.Errorf("%d readings at the stuck 9.5 °C, want at least %d", stuck, 6*12*3)
	}
}
