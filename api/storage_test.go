package api

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"tidemark/api/intake"
)

// waitStatus polls path until it answers code with a body that holds every
// given string, and returns the body.
func (r *running) waitStatus(t *testing.T, path string, code int, holds ...string) []byte {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for {
		c, b := r.call(t, "GET", path, "", nil)
		ok := c == code
		for _, h := range holds {
			ok = ok && strings.Contains(string(b), h)
		}
		if ok {
			return b
		}
		if time.Now().After(deadline) {
			t.Fatalf("GET %s: %d %s, want %d", path, c, b, code)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// TestVanishedDataDirectory: when the data directory is removed under a
// running service, POST /v1/events answers 503 instead of acknowledging
// events written into a deleted file, /readyz and /healthz fail, and the
// metrics say so — with or without traffic (issue 11, hole 2).
func TestVanishedDataDirectory(t *testing.T) {
	for _, traffic := range []bool{true, false} {
		t.Run(fmt.Sprintf("traffic=%v", traffic), func(t *testing.T) {
			cfg := testConfig(t, t.TempDir())
			r := start(t, cfg)
			lines := scenario(t, 1)
			r.post(t, "", lines[:100])
			r.waitCovered(t, 100)
			if err := os.RemoveAll(cfg.DataDir); err != nil {
				t.Fatal(err)
			}
			if traffic {
				code, b := r.call(t, "POST", "/v1/events", "", lines[100])
				if code != 503 || !strings.Contains(string(b), "vanished") {
					t.Errorf("POST /v1/events after the data directory vanished: %d %s, want 503 saying so", code, b)
				}
			}
			r.waitStatus(t, "/readyz", 503, "vanished")
			r.waitStatus(t, "/healthz", 503)
			if code, b := r.call(t, "POST", "/v1/events", "", lines[101]); code != 503 {
				t.Errorf("POST /v1/events: %d %s, want 503", code, b)
			}
			_, m := r.call(t, "GET", "/metrics", "", nil)
			for _, want := range []string{`tidemark_intake_faults_total{kind="vanished"} 1`, "tidemark_intake_stopped 1", "tidemark_ready 0"} {
				if !strings.Contains(string(m), want) {
					t.Errorf("/metrics lacks %q", want)
				}
			}
		})
	}
}

// journalWith writes n events into a fresh journal under dir/journal with
// small segments, as a service that stopped before any checkpoint would
// leave it, and returns the segments.
func journalWith(t *testing.T, dir string, lines [][]byte) []string {
	t.Helper()
	j, err := intake.OpenJournal(intake.JournalConfig{Dir: filepath.Join(dir, "journal"), SegmentBytes: 8 << 10})
	if err != nil {
		t.Fatal(err)
	}
	for _, l := range lines {
		if _, _, err := j.Append([][]byte{l}); err != nil {
			t.Fatal(err)
		}
	}
	j.Close()
	segs, _ := filepath.Glob(filepath.Join(dir, "journal", "seg-*.wal"))
	return segs
}

// TestJournalZeroTailOnStart: zeros after the last good record of the
// journal (a power cut in a pre-extended page) are cut at start and the
// service comes up with every event (issue 11, hole 3a: it refused to start).
func TestJournalZeroTailOnStart(t *testing.T) {
	dir := t.TempDir()
	lines := scenario(t, 1)[:300]
	segs := journalWith(t, dir, lines)
	f, _ := os.OpenFile(segs[len(segs)-1], os.O_WRONLY|os.O_APPEND, 0o600)
	f.Write(make([]byte, 4096))
	f.Close()
	r := start(t, testConfig(t, dir))
	rep := r.waitCovered(t, 300)
	if rep.Events != 300 {
		t.Errorf("%d events applied, want 300", rep.Events)
	}
	r.waitStatus(t, "/readyz", 200)
}

// TestJournalDamageStopsIntakeAndSkips: a damaged record in an older
// journal segment stops intake visibly — /readyz names the lost offsets,
// POST /v1/events refuses with the reason, a metric counts it — until the
// operator gives up exactly those offsets with POST /v1/intake/skip-damaged;
// then the service reads on, with every other event applied once (issue 11,
// hole 3b: intake stopped for good while events kept being acknowledged).
func TestJournalDamageStopsIntakeAndSkips(t *testing.T) {
	dir := t.TempDir()
	lines := scenario(t, 1)[:400]
	segs := journalWith(t, dir, lines)
	if len(segs) < 3 {
		t.Fatalf("%d segments, want several", len(segs))
	}
	b, _ := os.ReadFile(segs[0])
	b[len(b)/2] ^= 0xff // inside a record in the middle of the first segment
	os.WriteFile(segs[0], b, 0o600)

	cfg := testConfig(t, dir)
	cfg.JournalSegmentBytes = 8 << 10
	r := start(t, cfg)
	body := r.waitStatus(t, "/readyz", 503, "damaged", "offsets ")
	var ready struct{ Message string }
	json.Unmarshal(body, &ready)
	var from, to int64
	if !strings.Contains(ready.Message, "offsets ") {
		t.Fatalf("/readyz: %s", body)
	}
	if _, err := fmt.Sscanf(ready.Message[strings.Index(ready.Message, "offsets "):], "offsets %d to %d", &from, &to); err != nil {
		t.Fatalf("/readyz does not name the lost offsets: %s", body)
	}
	to++ // the message gives the last lost offset; the request takes the end, exclusive
	if from < 2 || to <= from || to > 400 {
		t.Fatalf("lost offsets %d to %d", from, to-1)
	}
	if code, b := r.call(t, "POST", "/v1/events", "", lines[0]); code != 503 || !strings.Contains(string(b), "damaged") {
		t.Errorf("POST /v1/events while intake is stopped: %d %s, want 503 with the reason", code, b)
	}
	_, m := r.call(t, "GET", "/metrics", "", nil)
	if !strings.Contains(string(m), `tidemark_intake_faults_total{kind="damage"} 1`) {
		t.Error("/metrics does not count the damage")
	}
	// The operator must name exactly what is lost.
	if code, b := r.call(t, "POST", "/v1/intake/skip-damaged", "", []byte(fmt.Sprintf(`{"from":%d,"to":%d}`, from, to+5))); code != 409 {
		t.Errorf("skip with the wrong range: %d %s, want 409", code, b)
	}
	code, sb := r.call(t, "POST", "/v1/intake/skip-damaged", "", []byte(fmt.Sprintf(`{"from":%d,"to":%d}`, from, to)))
	if code != 200 {
		t.Fatalf("skip: %d %s", code, sb)
	}
	rep := r.waitCovered(t, 400)
	lost := to - from
	if rep.Events != 400-lost || rep.Skipped != lost {
		t.Errorf("after the skip: %d events applied and %d skipped, want %d and %d", rep.Events, rep.Skipped, 400-lost, lost)
	}
	r.waitStatus(t, "/readyz", 200)
	// The report equals a replay of the events that were not lost.
	kept := append(append([][]byte{}, lines[:from-1]...), lines[to-1:]...)
	want := replayReport(t, engineConfig(t, serviceSpecs...), kept)
	sameJSON(t, "learners after the skip", stripPositions(rep.Learners), stripPositions(want.Learners))
	if code, b := r.call(t, "POST", "/v1/events", "", lines[0]); code != 200 {
		t.Errorf("POST /v1/events after the skip: %d %s", code, b)
	}
	_, m = r.call(t, "GET", "/metrics", "", nil)
	if !strings.Contains(string(m), fmt.Sprintf("tidemark_journal_lost_events_total %d", lost)) {
		t.Error("/metrics does not count the lost events")
	}
}
