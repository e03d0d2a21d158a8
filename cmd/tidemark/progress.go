package main

import (
	"io"
	"os"
	"strconv"
	"sync"
	"time"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"
)

// progress draws a progress bar on stderr for a long replay: bytes read of
// the file's size, events per second, time left. It is shown only when
// stderr is a terminal; lines logged meanwhile (rejections) are printed
// above the bar.
type progress struct {
	mu    sync.Mutex
	bar   *progressbar.ProgressBar
	out   io.Writer
	start time.Time
}

func newProgress(stderr io.Writer, size int64, quiet bool) *progress {
	f, ok := stderr.(*os.File)
	if quiet || !ok || !term.IsTerminal(int(f.Fd())) || size <= 0 {
		return nil
	}
	bar := progressbar.NewOptions64(size,
		progressbar.OptionSetWriter(stderr),
		progressbar.OptionSetDescription("replay"),
		progressbar.OptionShowBytes(true),
		progressbar.OptionShowCount(),
		progressbar.OptionSetPredictTime(true),
		progressbar.OptionThrottle(100_000_000),
		progressbar.OptionClearOnFinish(),
	)
	return &progress{bar: bar, out: stderr, start: time.Now()}
}

func (p *progress) update(read, size, lines int64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.bar.Set64(read)
	rate := float64(lines) / max(time.Since(p.start).Seconds(), 1e-3)
	p.bar.Describe("replay: " + strconv.FormatInt(lines, 10) + " lines, " + strconv.FormatFloat(rate, 'f', 0, 64) + " events/s")
}

func (p *progress) finish() {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.bar.Finish()
}

// writer returns a writer whose lines appear above the bar.
func (p *progress) writer() io.Writer { return lineWriter{p} }

type lineWriter struct{ p *progress }

func (w lineWriter) Write(b []byte) (int, error) {
	w.p.mu.Lock()
	defer w.p.mu.Unlock()
	w.p.bar.Clear()
	return w.p.out.Write(b)
}
