package intake

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"
)

func openJ(t *testing.T, dir string, seg int64) *Journal {
	t.Helper()
	j, err := OpenJournal(JournalConfig{Dir: dir, SegmentBytes: seg})
	if err != nil {
		t.Fatal(err)
	}
	return j
}

func readN(t *testing.T, j *Journal, from int64, n int) []string {
	t.Helper()
	r := j.Reader(from)
	defer r.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	var out []string
	for i := 0; i < n; i++ {
		off, p, err := r.Next(ctx)
		if err != nil {
			t.Fatalf("record %d: %v", i, err)
		}
		out = append(out, fmt.Sprintf("%d=%s", off, p))
	}
	return out
}

func TestJournalAppendReadAcrossSegmentsAndReopen(t *testing.T) {
	dir := t.TempDir()
	j := openJ(t, dir, 100) // tiny segments: every few records roll over
	for i := 1; i <= 30; i++ {
		first, last, err := j.Append([][]byte{[]byte(fmt.Sprintf("a%d", i)), []byte(fmt.Sprintf("b%d", i))})
		if err != nil || first != int64(2*i-1) || last != int64(2*i) {
			t.Fatalf("append %d: %d..%d %v", i, first, last, err)
		}
	}
	got := readN(t, j, 1, 60)
	if got[0] != "1=a1" || got[59] != "60=b30" {
		t.Errorf("read %v … %v", got[0], got[59])
	}
	if got := readN(t, j, 41, 1); got[0] != "41=a21" {
		t.Errorf("read from 41: %v", got)
	}
	j.Close()
	segs, _ := filepath.Glob(filepath.Join(dir, "seg-*.wal"))
	if len(segs) < 5 {
		t.Errorf("%d segments, want several", len(segs))
	}
	j = openJ(t, dir, 100)
	defer j.Close()
	if first, _, _ := j.Append([][]byte{[]byte("after")}); first != 61 {
		t.Errorf("after reopen, next offset %d, want 61", first)
	}
	if err := j.DeleteBefore(41); err != nil {
		t.Fatal(err)
	}
	if got := readN(t, j, 41, 21); got[20] != "61=after" {
		t.Errorf("after DeleteBefore(41): %v", got)
	}
	if _, _, err := j.Reader(1).Next(context.Background()); !errors.Is(err, ErrJournalCorrupt) {
		t.Errorf("reading a deleted offset: %v", err)
	}
}

func TestJournalTornTailTruncated(t *testing.T) {
	dir := t.TempDir()
	j := openJ(t, dir, 0)
	j.Append([][]byte{[]byte("one"), []byte("two"), []byte("three")})
	j.Close()
	seg := filepath.Join(dir, segName(1))
	b, _ := os.ReadFile(seg)
	for cut := 1; cut < len("three")+recordHeader; cut++ { // every torn length of the last record
		os.WriteFile(seg, b[:len(b)-cut], 0o600)
		var log strings.Builder
		j, err := OpenJournal(JournalConfig{Dir: dir, Log: &log})
		if err != nil {
			t.Fatalf("cut %d: %v", cut, err)
		}
		if j.Durable() != 2 || !strings.Contains(log.String(), "torn record") {
			t.Fatalf("cut %d: durable %d, log %q", cut, j.Durable(), log.String())
		}
		if first, _, _ := j.Append([][]byte{[]byte("3b")}); first != 3 {
			t.Fatalf("cut %d: next offset %d, want 3", cut, first)
		}
		if got := readN(t, j, 1, 3); got[2] != "3=3b" {
			t.Fatalf("cut %d: %v", cut, got)
		}
		j.Close()
	}
}

func TestJournalCorruptMiddleIsAnError(t *testing.T) {
	dir := t.TempDir()
	j := openJ(t, dir, 0)
	j.Append([][]byte{[]byte("one"), []byte("two"), []byte("three")})
	j.Close()
	seg := filepath.Join(dir, segName(1))
	b, _ := os.ReadFile(seg)
	b[recordHeader+1] ^= 0xff // inside the first payload
	os.WriteFile(seg, b, 0o600)
	if _, err := OpenJournal(JournalConfig{Dir: dir}); !errors.Is(err, ErrJournalCorrupt) || !strings.Contains(err.Error(), "byte 0") {
		t.Errorf("damaged first record: %v, want ErrJournalCorrupt naming byte 0", err)
	}
}

func TestJournalConcurrentAppendsGroupCommit(t *testing.T) {
	j := openJ(t, t.TempDir(), 0)
	defer j.Close()
	var wg sync.WaitGroup
	seen := make([]bool, 8*50+1)
	var mu sync.Mutex
	for w := 0; w < 8; w++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := 0; i < 50; i++ {
				first, last, err := j.Append([][]byte{[]byte("x")})
				if err != nil || first != last {
					t.Error(err)
					return
				}
				mu.Lock()
				seen[first] = true
				mu.Unlock()
			}
		}()
	}
	wg.Wait()
	for off := 1; off < len(seen); off++ {
		if !seen[off] {
			t.Fatalf("offset %d never handed out", off)
		}
	}
	if j.Durable() != 400 {
		t.Errorf("durable %d, want 400", j.Durable())
	}
}

func TestJournalReaderWaitsForDurable(t *testing.T) {
	j := openJ(t, t.TempDir(), 0)
	defer j.Close()
	r := j.Reader(1)
	ctx, cancel := context.WithTimeout(context.Background(), 50*time.Millisecond)
	defer cancel()
	if _, _, err := r.Next(ctx); !errors.Is(err, context.DeadlineExceeded) {
		t.Fatalf("empty journal: %v, want a wait until the deadline", err)
	}
	go func() { time.Sleep(10 * time.Millisecond); j.Append([][]byte{[]byte("late")}) }()
	off, p, err := r.Next(context.Background())
	if err != nil || off != 1 || string(p) != "late" {
		t.Errorf("Next after append: %d %q %v", off, p, err)
	}
}
