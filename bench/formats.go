package main

import (
	"bufio"
	"context"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"github.com/parquet-go/parquet-go"

	"tidemark/api/intake"
	"tidemark/api/replay"
	"tidemark/bench/synth"
	"tidemark/learner"
)

// formatsCase measures replay of the demo scenario (mean:window=100) from
// each history format against reading the same file's rows without making
// events of them — lines for NDJSON, records of encoding/csv, rows of
// parquet-go — in alternating rounds; then the peak memory of replaying 10⁶
// and 10⁷ rows of CSV and Parquet in child processes (it should not grow
// with the length).
func formatsCase() string {
	dir, err := os.MkdirTemp("", "tidemark-bench-formats-")
	if err != nil {
		panic(err)
	}
	defer os.RemoveAll(dir)
	rows := 100_000
	if quick {
		rows = 30_000
	}
	var b strings.Builder
	fmt.Fprintf(&b, "history formats: replay of %d rows (mean:window=100) against reading the same rows, alternating rounds\n", rows)
	for _, format := range []string{intake.FormatNDJSON, intake.FormatCSV, intake.FormatParquet} {
		path := filepath.Join(dir, "h."+format)
		if err := writeScenario(path, format, rows); err != nil {
			panic(err)
		}
		var events int64
		run := func(n int) {
			for range n {
				events = replayFile(path)
			}
		}
		read := func(n int) {
			for range n {
				readRows(path, format)
			}
		}
		p := paired(run, read, 1, 15)
		st, _ := os.Stat(path)
		fmt.Fprintf(&b, "  %-8s %5.1f MB: %6.0f ns a row, reading %6.0f ns: %.2f× (p10–p90 %.2f–%.2f)\n", format, float64(st.Size())/1e6,
			p.ours/float64(events), p.floor/float64(events), p.ratio(), p.lo, p.hi)
	}
	sizes := []int{1_000_000, 10_000_000}
	if quick {
		sizes = []int{100_000, 1_000_000}
	}
	for _, format := range []string{intake.FormatCSV, intake.FormatParquet} {
		var line []string
		for _, n := range sizes {
			path := filepath.Join(dir, "big."+format)
			if err := writeScenario(path, format, n); err != nil {
				panic(err)
			}
			out, _, err := runChild("-format-child", path)
			os.Remove(path)
			if err != nil {
				return b.String() + "  " + err.Error() + "\n"
			}
			var rate, hwm float64
			fmt.Sscan(out, &rate, &hwm)
			line = append(line, fmt.Sprintf("%d rows %.0f MiB (%.0f rows/s)", n, hwm, rate))
		}
		fmt.Fprintf(&b, "  peak RSS replaying %s: %s\n", format, strings.Join(line, ", "))
	}
	return b.String()
}

// writeScenario writes about n rows of the demo scenario to path in format.
func writeScenario(path, format string, n int) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	w := bufio.NewWriterSize(f, 1<<20)
	cfg := synth.Config{Days: max(1, n/864), Seed: 5}
	switch format {
	case intake.FormatCSV:
		_, err = synth.WriteCSV(w, cfg)
	case intake.FormatParquet:
		_, err = synth.WriteParquet(w, cfg)
	default:
		_, err = synth.Write(w, cfg)
	}
	if err == nil {
		err = w.Flush()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	return err
}

// replayFile replays path with one mean learner and returns the events.
func replayFile(path string) int64 {
	sp, _ := learner.ParseSpec("mean:window=100")
	eng, _ := learner.NewEngine(learner.Config{Learners: []learner.Spec{sp}})
	h, err := intake.OpenHistory(path)
	if err != nil {
		panic(err)
	}
	defer h.Close()
	if err := replay.Replay(context.Background(), h, eng, replay.ReplayConfig{}); err != nil {
		panic(err)
	}
	return eng.Applied() + eng.Rejected()
}

// readRows reads path's rows as the format's own library gives them.
func readRows(path, format string) {
	f, err := os.Open(path)
	if err != nil {
		panic(err)
	}
	defer f.Close()
	switch format {
	case intake.FormatCSV:
		r := csv.NewReader(bufio.NewReaderSize(f, 64<<10))
		r.ReuseRecord, r.FieldsPerRecord = true, -1
		for {
			if _, err := r.Read(); err == io.EOF {
				return
			}
		}
	case intake.FormatParquet:
		st, _ := f.Stat()
		pf, err := parquet.OpenFile(f, st.Size())
		if err != nil {
			panic(err)
		}
		buf := make([]parquet.Row, 256)
		for _, g := range pf.RowGroups() {
			rows := g.Rows()
			for {
				_, err := rows.ReadRows(buf)
				if errors.Is(err, io.EOF) {
					break
				}
			}
			rows.Close()
		}
	default:
		h := intake.NewHistoryReader(f)
		for {
			if _, _, err := h.Next(); err == io.EOF {
				return
			}
		}
	}
}

// formatChild replays path and prints rows per second and its own peak
// resident memory in MiB (VmHWM: the parent's rusage would count the pages
// the child shared with it before exec).
func formatChild(path string) {
	t0 := time.Now()
	n := replayFile(path)
	rate := float64(n) / time.Since(t0).Seconds()
	hwm := 0.0
	if b, err := os.ReadFile("/proc/self/status"); err == nil {
		for _, l := range strings.Split(string(b), "\n") {
			if v, ok := strings.CutPrefix(l, "VmHWM:"); ok {
				kb, _ := strconv.ParseFloat(strings.TrimSpace(strings.TrimSuffix(strings.TrimSpace(v), "kB")), 64)
				hwm = kb / 1024
			}
		}
	}
	fmt.Println(strconv.FormatFloat(rate, 'f', 0, 64), strconv.FormatFloat(hwm, 'f', 1, 64))
}
