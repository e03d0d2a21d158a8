package api

import (
	"bufio"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"tidemark/learner"
)

// TestEventsRefusedBeforeAcknowledging: POST /v1/events checks each event
// against the schema, the time the learners need and the key cap before
// journalling it, and answers with each refused line's number and reason;
// the accepted ones are journalled and applied, the refused never reach the
// engine or the dead-letter file (issue 11, hole 6: 10 000 such events were
// acknowledged, then all went to the dead-letter file).
func TestEventsRefusedBeforeAcknowledging(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.Engine.MaxKeys = 3
	r := start(t, cfg)
	lines := scenario(t, 1)
	r.post(t, "", lines[:30]) // fixes the schema; keys room-a, -b, -c
	r.waitCovered(t, 30)
	body := strings.Join([]string{
		string(lines[30]), // line 1: fine
		`{"time":"2026-03-01T12:00:00Z","key":"room-a","features":{"outdoor_c":5,"shift":"day"},"target":3}`, // 2: door_min missing
		"", // 3: blank
		`{"time":"2026-03-01T12:00:00Z","key":"room-a","features":{"outdoor_c":"warm","door_min":1,"shift":"day"},"target":3}`, // 4: wrong type
		`{"key":"room-a","features":{"outdoor_c":5,"door_min":1,"shift":"day"},"target":3}`,                                    // 5: no time
		`{"time":"2026-03-01T12:00:00Z","key":"room-d","features":{"outdoor_c":5,"door_min":1,"shift":"day"},"target":3}`,      // 6: a fourth key
		`not json`,        // 7
		string(lines[31]), // 8: fine
	}, "\n")
	code, b := r.call(t, "POST", "/v1/events", "", []byte(body))
	if code != 200 {
		t.Fatalf("POST: %d %s", code, b)
	}
	var resp EventsResponse
	json.Unmarshal(b, &resp)
	if resp.Accepted != 2 || resp.FirstOffset != 31 || resp.LastOffset != 32 {
		t.Errorf("accepted %d at %d..%d, want 2 at 31..32: %s", resp.Accepted, resp.FirstOffset, resp.LastOffset, b)
	}
	want := map[int]string{2: `feature "door_min" is missing`, 4: `feature "outdoor_c" must be a number`, 5: "time is missing",
		6: "past the cap of 3", 7: "invalid event"}
	if len(resp.Rejected) != len(want) {
		t.Errorf("%d refused, want %d: %s", len(resp.Rejected), len(want), b)
	}
	for _, rj := range resp.Rejected {
		if w, ok := want[rj.Line]; !ok || !strings.Contains(rj.Reason, w) {
			t.Errorf("line %d refused for %q, want %q", rj.Line, rj.Reason, w)
		}
	}
	rep := r.waitCovered(t, 32)
	if rep.Events != 32 || rep.Rejected != 0 {
		t.Errorf("engine: %d applied, %d rejected; want 32 and 0", rep.Events, rep.Rejected)
	}
	_, m := r.call(t, "GET", "/metrics", "", nil)
	for _, w := range []string{`tidemark_http_events_refused_total{reason="schema"} 2`, `tidemark_http_events_refused_total{reason="time"} 1`,
		`tidemark_http_events_refused_total{reason="key_cap"} 1`, `tidemark_http_events_refused_total{reason="decode"} 1`} {
		if !strings.Contains(string(m), w) {
			t.Errorf("/metrics lacks %q", w)
		}
	}
	// A request whose every event is refused is a 400 naming the first.
	code, b = r.call(t, "POST", "/v1/events", "", []byte("\n"+`{"key":"room-a","features":{},"target":1}`))
	if code != 400 || !strings.Contains(string(b), "line 2") {
		t.Errorf("all refused: %d %s, want 400 naming line 2", code, b)
	}
}

// TestStreamRejectionsCountedByReason: events that reach the engine from the
// stream and are refused there are counted per reason.
func TestStreamRejectionsCountedByReason(t *testing.T) {
	dir := t.TempDir()
	lines := scenario(t, 1)[:20]
	lines = append(lines, []byte(`{"time":"2026-03-01T12:00:00Z","key":"room-a","features":{"outdoor_c":5},"target":3}`), []byte(`{oops`))
	journalWith(t, dir, lines)
	r := start(t, testConfig(t, dir))
	r.waitCovered(t, 22)
	_, m := r.call(t, "GET", "/metrics", "", nil)
	for _, w := range []string{`tidemark_stream_rejections_total{reason="schema"} 1`, `tidemark_stream_rejections_total{reason="decode"} 1`} {
		if !strings.Contains(string(m), w) {
			t.Errorf("/metrics lacks %q", w)
		}
	}
}

// TestDeadLettersBounded: the dead-letter file is rotated once past its
// limit, so the two files hold at most twice the limit, and every line is a
// whole JSON object.
func TestDeadLettersBounded(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "deadletters.ndjson")
	const limit = 4 << 10
	d, err := openDeadLetters(path, limit)
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 1000; i++ {
		d.add(learner.Position{Offset: int64(i)}, fmt.Errorf("reason %d", i), []byte(strings.Repeat("x", 100)))
	}
	if err := d.Close(); err != nil {
		t.Fatal(err)
	}
	total := int64(0)
	last := -1
	for _, p := range []string{d.rotatedPath(), path} {
		st, err := os.Stat(p)
		if err != nil {
			t.Fatal(err)
		}
		if st.Size() > limit {
			t.Errorf("%s is %d bytes, past the limit of %d", filepath.Base(p), st.Size(), limit)
		}
		total += st.Size()
		f, _ := os.Open(p)
		sc := bufio.NewScanner(f)
		for sc.Scan() {
			var dl deadLetter
			if err := json.Unmarshal(sc.Bytes(), &dl); err != nil {
				t.Fatalf("%s: a line is not JSON: %v", p, err)
			}
			if int(dl.Position.Offset) <= last {
				t.Errorf("out of order: %d after %d", dl.Position.Offset, last)
			}
			last = int(dl.Position.Offset)
		}
		f.Close()
	}
	if last != 999 {
		t.Errorf("the newest dead letter is %d, want 999", last)
	}
	if d.count() != 1000 {
		t.Errorf("count %d, want 1000 (all written, older ones rotated away)", d.count())
	}
}

// TestCurvePointsOnlyWhereAppliedMoved: 300 good events, then 3 000 the
// engine rejects: the curves hold a point at 100, 200 and 300 applied events
// and no more (issue 13: every rejected event while the applied count sat on
// a multiple of the curve interval added a point, each a report over every
// key — 2 000 points at events=300).
func TestCurvePointsOnlyWhereAppliedMoved(t *testing.T) {
	dir := t.TempDir()
	lines := scenario(t, 1)[:300]
	for i := 0; i < 3000; i++ {
		lines = append(lines, []byte(fmt.Sprintf(`{"time":"2026-03-01T12:00:00Z","key":"room-a","features":{"outdoor_c":%d},"target":3}`, i)))
	}
	journalWith(t, dir, lines)
	cfg := testConfig(t, dir)
	cfg.CurveEvery = 100
	r := start(t, cfg)
	r.waitCovered(t, 3300)
	code, b := r.call(t, "GET", "/v1/learners/mean:window=50/curve", "", nil)
	var curve struct {
		Points []struct {
			Events int64 `json:"events"`
		} `json:"points"`
	}
	json.Unmarshal(b, &curve)
	var at []int64
	for _, p := range curve.Points {
		at = append(at, p.Events)
	}
	if code != 200 || fmt.Sprint(at) != "[100 200 300]" {
		t.Errorf("curve points at %v, want [100 200 300]", at)
	}
}
