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
// an invalid tail) and then read back, in order, every offset it reports
// durable — each either read or named lost by a DamageError, after which a
// reader started at its To goes on — never panic, hang or allocate past the
// record limit.
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
	f.Add(good[recordHeader+len(`{"target":1}`):])                    // the first record lost: offsets start at 2
	f.Add(append(append([]byte(nil), good...), make([]byte, 512)...)) // a zero tail
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
		defer func() { r.Close() }()
		ctx, cancel := context.WithTimeout(context.Background(), time.Second)
		defer cancel()
		for off := int64(1); off <= j.Durable(); off++ {
			got, _, err := r.Next(ctx)
			var d *DamageError
			if errors.As(err, &d) {
				if d.From != off || d.To <= d.From || d.To > j.Durable()+1 {
					t.Fatalf("at offset %d of %d durable: damage %v", off, j.Durable(), d)
				}
				r.Close()
				r = j.Reader(d.To)
				off = d.To - 1
				continue
			}
			if err != nil || got != off {
				t.Fatalf("record %d of %d durable: offset %d, %v", off, j.Durable(), got, err)
			}
		}
		if _, _, err := j.Append([][]byte{[]byte("after")}); err != nil {
			t.Fatalf("append after open: %v", err)
		}
	})
}
