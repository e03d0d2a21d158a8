package checkpoint

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"
	"time"
)

// readStream reads every section of version v through Stream and returns
// them with Close's verdict (or the first error).
func readStream(s *Store, v uint64) ([]Section, error) {
	st, err := s.Stream(v)
	if err != nil {
		return nil, err
	}
	var secs []Section
	for {
		g, p, size, ok, err := st.NextSection()
		if err != nil {
			st.Close()
			return secs, err
		}
		if !ok {
			break
		}
		sec := Section{Global: g, Partition: p, Bytes: []byte{}}
		for {
			b, err := st.Piece()
			if err == io.EOF {
				break
			}
			if err != nil {
				st.Close()
				return secs, err
			}
			sec.Bytes = append(sec.Bytes, b...)
		}
		if int64(len(sec.Bytes)) != size {
			st.Close()
			return secs, fmt.Errorf("section of %d bytes, said %d", len(sec.Bytes), size)
		}
		secs = append(secs, sec)
	}
	return secs, st.Close()
}

// largeSections are sections of which one spans several of the stream's
// pieces.
func largeSections() []Section {
	rng := rand.New(rand.NewPCG(3, 4))
	big := make([]byte, 3*streamPiece+12345)
	for i := range big {
		big[i] = byte(rng.IntN(16)) // compressible, not constant
	}
	secs := testSections(2)
	return append(secs, Section{Partition: 7, Bytes: big})
}

// TestStreamReadsWhatWasWritten: a state read through Stream, a section
// larger than its pieces included, is the state written, in both formats.
func TestStreamReadsWhatWasWritten(t *testing.T) {
	s := openTest(t, StoreConfig{})
	want := largeSections()
	if _, err := s.Write(manifest(5), want); err != nil {
		t.Fatal(err)
	}
	got, err := readStream(s, 1)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != len(want) {
		t.Fatalf("%d sections, want %d", len(got), len(want))
	}
	for i := range want {
		if got[i].Global != want[i].Global || got[i].Partition != want[i].Partition || !bytes.Equal(got[i].Bytes, want[i].Bytes) {
			t.Fatalf("section %d differs", i)
		}
	}
	// Format 1, read whole behind the same calls.
	m := manifest(3)
	m.Version, m.Created = 2, time.Date(2026, 12, 1, 0, 0, 0, 0, time.UTC)
	b, err := encodeFile(&m, testSections(2), s.enc.EncodeAll)
	if err != nil {
		t.Fatal(err)
	}
	os.WriteFile(filepath.Join(s.Dir(), FileName(2)), b, 0o600)
	got, err = readStream(s, 2)
	if err != nil || stateDigest(got) != stateDigest(testSections(2)) {
		t.Fatalf("a version-1 file through Stream: %v", err)
	}
	if _, err := s.Stream(9); !errors.Is(err, ErrNotFound) {
		t.Errorf("a missing version: %v, want ErrNotFound", err)
	}
}

// TestStreamCorruptionMatrix: every single-byte change of a checkpoint file
// (three ways), every truncation and an appended byte are refused by the
// time the stream is closed — at open, while reading, or by Close — with an
// error wrapping ErrCorrupt, as Load refuses them (TestCorruptionMatrix).
func TestStreamCorruptionMatrix(t *testing.T) {
	s := openTest(t, StoreConfig{})
	if _, err := s.Write(manifest(5), testSections(2)); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(s.Dir(), FileName(1))
	good, _ := os.ReadFile(path)
	tried := 0
	check := func(what string, b []byte) {
		t.Helper()
		os.WriteFile(path, b, 0o600)
		if _, err := readStream(s, 1); !errors.Is(err, ErrCorrupt) {
			t.Fatalf("%s: error %v, want ErrCorrupt", what, err)
		}
		tried++
	}
	for i := range good {
		for _, x := range []byte{0x01, 0x80, 0xff} {
			b := bytes.Clone(good)
			b[i] ^= x
			check(fmt.Sprintf("byte %d ^ %#x", i, x), b)
		}
	}
	for n := 0; n < len(good); n++ {
		check(fmt.Sprintf("truncated to %d", n), good[:n])
	}
	check("one byte appended", append(bytes.Clone(good), 0))
	t.Logf("%d corrupted copies of a %d-byte checkpoint, all refused", tried, len(good))
	os.WriteFile(path, good, 0o600)
	if _, err := readStream(s, 1); err != nil {
		t.Fatalf("the restored good file fails: %v", err)
	}
}

// TestStreamCloseEarlyGivesTheVerdict: a reader that stops after the first
// section (its own decoding failed) still learns from Close whether the file
// was at fault, for a good file and for one damaged in its last section.
func TestStreamCloseEarlyGivesTheVerdict(t *testing.T) {
	s := openTest(t, StoreConfig{})
	in, err := s.Write(manifest(5), largeSections())
	if err != nil {
		t.Fatal(err)
	}
	early := func() error {
		st, err := s.Stream(1)
		if err != nil {
			return err
		}
		st.NextSection()
		st.Piece()
		return st.Close()
	}
	if err := early(); err != nil {
		t.Fatalf("a good file closed early: %v", err)
	}
	path := filepath.Join(s.Dir(), in.File)
	b, _ := os.ReadFile(path)
	b[len(b)/2] ^= 0x10 // inside the large last section's frame
	os.WriteFile(path, b, 0o600)
	if err := early(); !errors.Is(err, ErrCorrupt) {
		t.Errorf("a damaged file closed early: %v, want ErrCorrupt", err)
	}
}
