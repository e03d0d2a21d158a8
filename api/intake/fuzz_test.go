package intake

import (
	"context"
	"errors"
	"os"
	"path/filepath"
	"testing"
	"time"
)

// FuzzJournalSegment opens a journal whose only segment holds arbitrary
// bytes: it must either refuse with ErrJournalCorrupt or open (after cutting
// a torn tail) and then read back exactly the records it reports durable —
// never panic, hang or allocate past the record limit.
func FuzzJournalSegment(f *testing.F) {
	dir := f.TempDir()
	j, _ := OpenJournal(JournalConfig{Dir: dir})
	j.Append([][]byte{[]byte(`{"target":1}`), []byte(`{"target":2,"features":{"a":1}}`), {}})
	j.Close()
	good, _ := os.ReadFile(filepath.Join(dir, segName(1)))
	f.Add(good)
	f.Add(good[:len(good)-3])
	f.Add([]byte{})
	f.Add([]byte{0xff, 0xff, 0xff, 0xff, 0, 0, 0, 0, 1, 0, 0, 0, 0, 0, 0, 0})
	f.Fuzz(func(t *testing.T, seg []byte) {
		dir := t.TempDir()
		os.WriteFile(filepath.Join(dir, segName(1)), seg, 0o600)
		j, err := OpenJournal(JournalConfig{Dir: dir})
		if err != nil {
			if !errors.Is(err, ErrJournalCorrupt) {
				t.Fatalf("open: %v, want ErrJournalCorrupt", err)
			}
			return
		}
		defer j.Close()
		r := j.Reader(1)
		defer r.Close()
		ctx, cancel := context.WithTimeout(context.Background(), time.Second)
		defer cancel()
		for off := int64(1); off <= j.Durable(); off++ {
			got, _, err := r.Next(ctx)
			if err != nil || got != off {
				t.Fatalf("record %d of %d durable: offset %d, %v", off, j.Durable(), got, err)
			}
		}
		if _, _, err := j.Append([][]byte{[]byte("after")}); err != nil {
			t.Fatalf("append after open: %v", err)
		}
	})
}
