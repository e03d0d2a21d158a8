package chart_test

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/xml"
	"fmt"
	"image/png"
	"io"
	"os"
	"path/filepath"
	"testing"

	"tidemark/api/intake"
	"tidemark/api/replay"
	"tidemark/api/replay/chart"
	"tidemark/bench/synth"
	"tidemark/learner"
)

func record(t *testing.T, every int64) (*chart.Recorder, *learner.Engine) {
	t.Helper()
	return recordDays(t, 2, every)
}

func recordDays(t *testing.T, days int, every int64) (*chart.Recorder, *learner.Engine) {
	t.Helper()
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: days, Seed: 4})
	cfg := learner.Config{Features: learner.FeatureConfig{HashBuckets: 4}}
	for _, s := range []string{"knn:k=5,window=300", "rls:forget=0.99", "mean"} {
		sp, _ := learner.ParseSpec(s)
		cfg.Learners = append(cfg.Learners, sp)
	}
	eng, _ := learner.NewEngine(cfg)
	rec := chart.NewRecorder(eng, every, "room-b")
	if err := replay.Replay(context.Background(), intake.NewHistoryReader(&buf), eng, replay.ReplayConfig{Observe: rec.Observe}); err != nil {
		t.Fatal(err)
	}
	rec.Finish(eng)
	return rec, eng
}

func TestCurveCSV(t *testing.T) {
	rec, eng := record(t, 200)
	var b bytes.Buffer
	if err := rec.WriteCSV(&b); err != nil {
		t.Fatal(err)
	}
	rows, err := csv.NewReader(&b).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	head := []string{"position", "time", "events", "knn:k=5,window=300 mae", "knn:k=5,window=300 rmse", "rls:forget=0.99 mae", "rls:forget=0.99 rmse", "mean mae", "mean rmse"}
	if len(rows[0]) != len(head) {
		t.Fatalf("header %q, want %q", rows[0], head)
	}
	for i := range head {
		if rows[0][i] != head[i] {
			t.Errorf("header column %d is %q, want %q", i, rows[0][i], head[i])
		}
	}
	// 1728 events in buckets of 200: 8 full buckets and a last partial one.
	if n := eng.Applied(); len(rows)-1 != int(n/200)+1 {
		t.Errorf("%d rows for %d events in buckets of 200", len(rows)-1, n)
	}
	last := rows[len(rows)-1]
	if last[2] != "1728" || last[1] == "" {
		t.Errorf("last row %q", last)
	}
}

func TestPlotFilesAreValid(t *testing.T) {
	rec, _ := record(t, 100)
	dir := t.TempDir()
	pngPath, svgPath := filepath.Join(dir, "p.png"), filepath.Join(dir, "p.svg")
	if err := rec.Plot(pngPath, "kW"); err != nil {
		t.Fatal(err)
	}
	f, _ := os.Open(pngPath)
	img, err := png.Decode(f)
	f.Close()
	if err != nil || img.Bounds().Dx() < 500 {
		t.Errorf("PNG does not decode: %v", err)
	}
	if err := rec.Plot(svgPath, "kW"); err != nil {
		t.Fatal(err)
	}
	b, _ := os.ReadFile(svgPath)
	d := xml.NewDecoder(bytes.NewReader(b))
	elements := 0
	for {
		tok, err := d.Token()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatalf("SVG does not parse: %v", err)
		}
		if _, ok := tok.(xml.StartElement); ok {
			elements++
		}
	}
	if elements < 50 || !bytes.Contains(b, []byte("recent RMSE (kW)")) {
		t.Errorf("SVG has %d elements and no axis label", elements)
	}
	if err := rec.Plot(filepath.Join(dir, "p.gif"), ""); err == nil {
		t.Error("a .gif plot was accepted")
	}
}

// TestLongCurveStaysBounded: seven days of the demo scenario (6 048 events)
// with a row per event would pass chart.MaxRows; the curve then keeps every
// other row and doubles its step, so that its rows are exactly those of a
// recorder that took a row every two events from the start.
func TestLongCurveStaysBounded(t *testing.T) {
	fine, _ := recordDays(t, 7, 1)
	coarse, _ := recordDays(t, 7, 2)
	if fine.Every != 2 || len(fine.Rows()) > chart.MaxRows {
		t.Fatalf("step %d, %d rows; want 2 and at most %d", fine.Every, len(fine.Rows()), chart.MaxRows)
	}
	// (%v prints the NaN of a learner that has not scored yet; JSON cannot.)
	if g, w := fmt.Sprintf("%v", fine.Rows()), fmt.Sprintf("%v", coarse.Rows()); g != w || len(fine.Rows()) < 2000 {
		t.Errorf("the thinned curve (%d rows) differs from one recorded every two events (%d rows)", len(fine.Rows()), len(coarse.Rows()))
	}
}
