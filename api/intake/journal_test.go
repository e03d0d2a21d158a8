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

// TestJournalDamageNamesLostOffsets: a damaged record with valid records
// after it is not cut on open (that would drop acknowledged events); a
// reader that meets it reports exactly which offsets are lost, and a reader
// started past them reads on (issue 11, hole 3: damage used to stop intake
// for good).
func TestJournalDamageNamesLostOffsets(t *testing.T) {
	dir := t.TempDir()
	j := openJ(t, dir, 0)
	j.Append([][]byte{[]byte("one"), []byte("two"), []byte("three")})
	j.Close()
	seg := filepath.Join(dir, segName(1))
	b, _ := os.ReadFile(seg)
	b[recordHeader+1] ^= 0xff // inside the first payload
	os.WriteFile(seg, b, 0o600)
	j, err := OpenJournal(JournalConfig{Dir: dir})
	if err != nil {
		t.Fatalf("open with a damaged first record and valid ones after it: %v", err)
	}
	defer j.Close()
	if j.Durable() != 3 {
		t.Errorf("durable %d, want 3 (the valid records after the damage count)", j.Durable())
	}
	_, _, err = j.Reader(1).Next(context.Background())
	var d *DamageError
	if !errors.As(err, &d) || !errors.Is(err, ErrJournalCorrupt) || d.Byte != 0 || d.From != 1 || d.To != 2 || d.Segment != segName(1) {
		t.Fatalf("reading from 1: %v, want a DamageError at byte 0 losing offset 1 only", err)
	}
	if got := readN(t, j, 2, 2); got[0] != "2=two" || got[1] != "3=three" {
		t.Errorf("reading from 2: %v", got)
	}
}

// TestJournalDamageInOlderSegment: a damaged record in a segment that is not
// the last loses the offsets up to the next valid record; one with nothing
// valid after it in its segment loses the rest of that segment.
func TestJournalDamageInOlderSegment(t *testing.T) {
	dir := t.TempDir()
	j := openJ(t, dir, 60) // a few records per segment
	var ps [][]byte
	for i := 1; i <= 20; i++ {
		ps = append(ps, []byte(fmt.Sprintf("event-%02d", i)))
	}
	for _, p := range ps {
		j.Append([][]byte{p})
	}
	segs, _ := j.segments()
	if len(segs) < 3 {
		t.Fatalf("%d segments, want at least 3", len(segs))
	}
	// Damage the last record of the first segment: nothing valid follows it
	// there, so the loss runs to the second segment's first offset.
	first := segs[0]
	b, _ := os.ReadFile(first.path)
	b[len(b)-1] ^= 0xff
	os.WriteFile(first.path, b, 0o600)
	var err error
	var d *DamageError
	// The first record is fine; read it, then meet the damage.
	r := j.Reader(1)
	if off, _, err := r.Next(context.Background()); err != nil || off != 1 {
		t.Fatalf("first record: %d %v", off, err)
	}
	for {
		_, _, err = r.Next(context.Background())
		if err != nil {
			break
		}
	}
	if !errors.As(err, &d) || d.To != segs[1].start || d.From != segs[1].start-1 {
		t.Fatalf("damage in the first segment: %v, want offsets %d to %d lost", err, segs[1].start-1, segs[1].start-1)
	}
	if got := readN(t, j, d.To, 1); got[0] != fmt.Sprintf("%d=event-%02d", d.To, d.To) {
		t.Errorf("reading past the damage: %v", got)
	}
	j.Close()
	// The service does not refuse to start over damage in an older segment.
	j = openJ(t, dir, 60)
	j.Close()
}

// TestJournalZeroTailCut: zeros after the last good record (a power cut in
// a pre-extended page) are cut on open with their size reported.
func TestJournalZeroTailCut(t *testing.T) {
	dir := t.TempDir()
	j := openJ(t, dir, 0)
	j.Append([][]byte{[]byte("one"), []byte("two")})
	j.Close()
	seg := filepath.Join(dir, segName(1))
	f, _ := os.OpenFile(seg, os.O_WRONLY|os.O_APPEND, 0o600)
	f.Write(make([]byte, 4096))
	f.Close()
	var log strings.Builder
	j, err := OpenJournal(JournalConfig{Dir: dir, Log: &log})
	if err != nil {
		t.Fatalf("open with a zero tail: %v", err)
	}
	defer j.Close()
	if j.Durable() != 2 || !strings.Contains(log.String(), "cut 4096 bytes") {
		t.Errorf("durable %d, log %q; want 2 and the 4096 bytes named", j.Durable(), log.String())
	}
	if first, _, _ := j.Append([][]byte{[]byte("three")}); first != 3 {
		t.Errorf("next offset %d, want 3", first)
	}
}

// TestJournalVanishedDirectory: when the journal's directory is removed
// under it, Append fails with ErrJournalVanished instead of acknowledging
// events written into a deleted file, and keeps failing; Check says so too.
func TestJournalVanishedDirectory(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "journal")
	j := openJ(t, dir, 0)
	defer j.Close()
	if _, _, err := j.Append([][]byte{[]byte("one")}); err != nil {
		t.Fatal(err)
	}
	if err := j.Check(); err != nil {
		t.Fatalf("Check on a healthy journal: %v", err)
	}
	os.RemoveAll(dir)
	if _, _, err := j.Append([][]byte{[]byte("two")}); !errors.Is(err, ErrJournalVanished) {
		t.Errorf("append after the directory was removed: %v, want ErrJournalVanished", err)
	}
	if j.Durable() != 1 {
		t.Errorf("durable %d after the failed append, want 1", j.Durable())
	}
	if err := j.Check(); !errors.Is(err, ErrJournalVanished) {
		t.Errorf("Check: %v", err)
	}
	// Moved rather than removed: the same.
	dir2 := filepath.Join(t.TempDir(), "journal")
	j2 := openJ(t, dir2, 0)
	defer j2.Close()
	os.Rename(dir2, dir2+"-moved")
	if err := j2.Check(); !errors.Is(err, ErrJournalVanished) {
		t.Errorf("Check after the directory was moved: %v", err)
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
