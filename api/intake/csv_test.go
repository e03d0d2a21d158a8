package intake

import (
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"os"
	"os/exec"
	"strings"
	"testing"
	"time"

	"tidemark/learner"
)

// readRows decodes every row of a CSV history into events (or the row's
// error), keyed by row number.
func readRows(t *testing.T, h *History) (evs map[int64]learner.Event, bad map[int64]error) {
	t.Helper()
	evs, bad = map[int64]learner.Event{}, map[int64]error{}
	for {
		line, no, err := h.Next()
		if err == io.EOF {
			return
		}
		if err != nil {
			if !errors.Is(err, ErrBadRow) {
				t.Fatalf("row %d: %v", no, err)
			}
			bad[no] = err
			continue
		}
		if !json.Valid(line) {
			t.Fatalf("row %d became %s, not JSON", no, line)
		}
		var ev learner.Event
		if err := learner.DecodeEvent(line, &ev); err != nil {
			bad[no] = err
			continue
		}
		evs[no] = ev
	}
}

// TestCSVWrittenByPythonReadsBack: a history written by Python's csv module
// (Debian's python3; its default dialect quotes fields with commas, quotes
// or newlines and ends rows with CRLF — common practice for CSV exports)
// reads back to the events written out here by hand.
func TestCSVWrittenByPythonReadsBack(t *testing.T) {
	py := "/usr/bin/python3"
	if _, err := os.Stat(py); err != nil {
		if os.Getenv("TIDEMARK_REQUIRE_PYTHON") != "" {
			t.Fatal("python3 is required")
		}
		t.Skip("no /usr/bin/python3 (Debian's python3); CI runs this test")
	}
	script := `
import csv, sys
w = csv.writer(sys.stdout)
w.writerow(["time", "key", "outdoor_c", "shift", "target", "note"])
w.writerow(["2026-03-01T00:00:00Z", "room, a", "5.9", "night", "40.49", "x"])
w.writerow(["2026-03-01T00:05:00+01:00", 'room "b"', "-0.5", "day\nshift", "1e2", ""])
w.writerow(["2026-03-01T00:10:00Z", "room-c", "", "late", "n/a", "y"])
w.writerow(["2026-03-01T00:15:00Z", "room-c", "3", "late"])
`
	out, err := exec.Command(py, "-c", script).Output()
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Contains(out, []byte("\r\n")) {
		t.Fatalf("python's csv did not write CRLF rows: %q", out)
	}
	h, err := NewCSVHistoryReader(bytes.NewReader(out), Fields{Ignore: []string{"note"}})
	if err != nil {
		t.Fatal(err)
	}
	evs, bad := readRows(t, h)
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC).UnixNano()
	want := map[int64]learner.Event{
		1: {Time: t0, HasTime: true, Key: "room, a", Target: 40.49, Features: []learner.Feature{{Name: "outdoor_c", Num: 5.9}, {Name: "shift", Str: "night", IsStr: true}}},
		// 00:05 at +01:00 is 23:05 the day before, UTC.
		2: {Time: t0 - int64(55*time.Minute), HasTime: true, Key: `room "b"`, Target: 100, Features: []learner.Feature{{Name: "outdoor_c", Num: -0.5}, {Name: "shift", Str: "day\nshift", IsStr: true}}},
	}
	for no, w := range want {
		got, ok := evs[no]
		if !ok {
			t.Errorf("row %d: no event (%v)", no, bad[no])
			continue
		}
		g, _ := json.Marshal(got)
		e, _ := json.Marshal(w)
		if !bytes.Equal(g, e) {
			t.Errorf("row %d:\n got %s\nwant %s", no, g, e)
		}
	}
	// Row 3: target "n/a" is refused as not a number; row 4 has too few fields.
	if err := bad[3]; err == nil || !strings.Contains(err.Error(), "target") {
		t.Errorf("row 3: %v, want a refusal of its target", err)
	}
	if err := bad[4]; !errors.Is(err, ErrBadRow) || !strings.Contains(err.Error(), "line 6") {
		t.Errorf("row 4: %v, want a bad row naming line 6 of the file", err)
	}
}

// TestCSVTimeFormats: epoch seconds, milliseconds and microseconds (integers
// or decimals) and a layout in a zone give the instants worked out here.
func TestCSVTimeFormats(t *testing.T) {
	// 1772460000 s since 1970, by hand: 20 514 days × 86 400 s + 14 h × 3 600 s
	// (20 514 days from 1970-01-01 is 2026-03-02; `date -u -d @1772460000` agrees).
	want := time.Date(2026, 3, 2, 14, 0, 0, 0, time.UTC)
	oslo, err := time.LoadLocation("Europe/Oslo")
	if err != nil {
		t.Skip("no time zone database")
	}
	for _, c := range []struct {
		format, cell string
		zone         *time.Location
		want         time.Time
	}{
		{TimeUnixS, "1772460000", nil, want},
		{TimeUnixS, "1772460000.25", nil, want.Add(250 * time.Millisecond)},
		{TimeUnixMS, "1772460000000", nil, want},
		{TimeUnixUS, "1772460000000000", nil, want},
		{TimeRFC3339, "2026-03-02T15:00:00+01:00", nil, want},
		{"2006-01-02 15:04", "2026-03-02 14:00", nil, want},
		{"2006-01-02 15:04", "2026-03-02 15:00", oslo, want}, // CET in March: UTC+1
	} {
		h, err := NewCSVHistoryReader(strings.NewReader("ts,target\n"+c.cell+",1\n"), Fields{Time: "ts", TimeFormat: c.format, Zone: c.zone})
		if err != nil {
			t.Fatal(err)
		}
		evs, bad := readRows(t, h)
		if ev, ok := evs[1]; !ok || !ev.HasTime || ev.Time != c.want.UnixNano() {
			t.Errorf("%s %q: %v (%v), want %v", c.format, c.cell, time.Unix(0, ev.Time).UTC(), bad[1], c.want)
		}
	}
	h, _ := NewCSVHistoryReader(strings.NewReader("time,target\nyesterday,1\n"), Fields{})
	if _, bad := readRows(t, h); !errors.Is(bad[1], ErrBadRow) || !strings.Contains(bad[1].Error(), "yesterday") {
		t.Errorf("a time that does not parse: %v", bad[1])
	}
	if err := (Fields{Time: "a", Key: "a"}).Validate(); err == nil {
		t.Error("a time field that is also the key field was accepted")
	}
}

// FuzzCSVHistory: whatever the bytes, reading them as a CSV history never
// panics, and every row that becomes an event is valid JSON the decoder
// takes or refuses with a reason.
func FuzzCSVHistory(f *testing.F) {
	for _, s := range []string{"time,key,x,target\n2026-03-01T00:00:00Z,a,1,2\n", "target\n1\n2\n", "a,target\n\"x\"\"y\",1\n", "target,x\n1,\"\n", "\ufefftarget\n1\n", "x\n1\n", "target,x\n1,\xff\n"} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		h, err := NewCSVHistoryReader(bytes.NewReader(data), Fields{})
		if err != nil {
			return
		}
		for i := 0; i < 10_000; i++ {
			line, _, err := h.Next()
			if err == io.EOF {
				return
			}
			if err != nil {
				continue
			}
			if !json.Valid(line) {
				t.Fatalf("%q became %s, not JSON", data, line)
			}
			var ev learner.Event
			learner.DecodeEvent(line, &ev)
		}
	})
}

// TestCSVRenameAndDeclare: a column renamed becomes the feature of its new
// name, and declarations name features after renaming.
func TestCSVRenameAndDeclare(t *testing.T) {
	h, err := NewCSVHistoryReader(strings.NewReader("temp,zone,target\n21.5,12,1\n"), Fields{Rename: map[string]string{"temp": "outdoor_c"}, Categorical: []string{"zone"}})
	if err != nil {
		t.Fatal(err)
	}
	evs, bad := readRows(t, h)
	want := learner.Event{Target: 1, Features: []learner.Feature{{Name: "outdoor_c", Num: 21.5}, {Name: "zone", Str: "12", IsStr: true}}}
	g, _ := json.Marshal(evs[1])
	w, _ := json.Marshal(want)
	if string(g) != string(w) {
		t.Errorf("got %s (%v), want %s", g, bad[1], w)
	}
	if _, err := NewCSVHistoryReader(strings.NewReader("a,b,target\n"), Fields{Rename: map[string]string{"a": "b"}}); err == nil {
		t.Error("two columns that become one feature were taken")
	}
}
