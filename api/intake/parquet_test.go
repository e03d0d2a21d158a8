package intake

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/parquet-go/parquet-go"

	"tidemark/learner"
)

// TestParquetWrittenByTheLibraryReadsBack: a file written by parquet-go's
// own writer — a TIMESTAMP(millisecond) time column, text and numbers, a
// null — reads back to the events written out here by hand, and a row
// without a target is refused by its row number.
func TestParquetWrittenByTheLibraryReadsBack(t *testing.T) {
	type row struct {
		When   time.Time `parquet:"when,timestamp(millisecond)"`
		Device string    `parquet:"device"`
		Temp   *float64  `parquet:"temp,optional"`
		Mode   string    `parquet:"mode"`
		Door   int32     `parquet:"door"`
		KWh    *float64  `parquet:"kwh,optional"`
	}
	f := func(v float64) *float64 { return &v }
	t0 := time.Date(2026, 3, 2, 14, 0, 0, 0, time.UTC)
	rows := []row{
		{When: t0, Device: "meter, 1", Temp: f(21.5), Mode: "eco", Door: 3, KWh: f(41.7)},
		{When: t0.Add(1500 * time.Millisecond), Device: `m"2`, Temp: nil, Mode: "12", Door: -1, KWh: f(-0.25)},
		{When: t0, Device: "m3", Temp: f(1), Mode: "eco", Door: 0, KWh: nil},
	}
	path := filepath.Join(t.TempDir(), "h.parquet")
	var buf bytes.Buffer
	w := parquet.NewGenericWriter[row](&buf)
	if _, err := w.Write(rows); err != nil {
		t.Fatal(err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(path, buf.Bytes(), 0o600); err != nil {
		t.Fatal(err)
	}
	if FormatOf(path) != FormatParquet {
		t.Fatalf("%s is not taken for Parquet by its name", path)
	}
	h, err := OpenHistoryAs(path, FormatParquet, Fields{Time: "when", Key: "device", Target: "kwh"})
	if err != nil {
		t.Fatal(err)
	}
	defer h.Close()
	evs, bad := readRows(t, h)
	want := map[int64]learner.Event{
		1: {Time: t0.UnixNano(), HasTime: true, Key: "meter, 1", Target: 41.7,
			Features: []learner.Feature{{Name: "door", Num: 3}, {Name: "mode", Str: "eco", IsStr: true}, {Name: "temp", Num: 21.5}}},
		// A null is a feature the row does not have; text stays text ("12").
		2: {Time: t0.Add(1500 * time.Millisecond).UnixNano(), HasTime: true, Key: `m"2`, Target: -0.25,
			Features: []learner.Feature{{Name: "door", Num: -1}, {Name: "mode", Str: "12", IsStr: true}}},
	}
	for no, w := range want {
		g, _ := json.Marshal(evs[no])
		e, _ := json.Marshal(w)
		if !bytes.Equal(g, e) {
			t.Errorf("row %d (%v):\n got %s\nwant %s", no, bad[no], g, e)
		}
	}
	if err := bad[3]; err == nil {
		t.Error("row 3, without a target, was taken")
	}
	if h.Unit() != "row" {
		t.Errorf("positions are %ss, want rows", h.Unit())
	}
}
