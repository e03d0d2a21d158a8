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
// them with Close's verdict (or the first error), checking that each section
// is as long as the stream said.
func readStream(s *Store, v uint64) ([]Section, error) {
	st, err := s.Stream(v)
	if err != nil {
		return nil, err
	}
	secs, sizes, err := readAll(st)
	for i := range secs {
		if err == nil && int64(len(secs[i].Bytes)) != sizes[i] {
			err = fmt.Errorf("section of %d bytes, said %d", len(secs[i].Bytes), sizes[i])
		}
	}
	return secs, err
}

// readAll reads every section of st and closes it; it returns the sections,
// the length st said of each, and the first error or else Close's verdict.
func readAll(st *Stream) (secs []Section, sizes []int64, err error) {
	for {
		g, p, size, ok, err := st.NextSection()
		if err != nil || !ok {
			if cerr := st.Close(); err == nil {
				err = cerr
			}
			return secs, sizes, err
		}
		sec := Section{Global: g, Partition: p, Bytes: []byte{}}
		for {
			b, err := st.Piece()
			if err == io.EOF {
				break
			}
			if err != nil {
				st.Close()
				return secs, sizes, err
			}
			sec.Bytes = append(sec.Bytes, b...)
		}
		secs, sizes = append(secs, sec), append(sizes, size)
	}
}

// eachDamage calls f with every damaged copy of good: each byte flipped three
// ways, each truncation, a byte appended; it returns how many.
func eachDamage(good []byte, f func(what string, b []byte)) int {
	n := 0
	for i := range good {
		for _, x := range []byte{0x01, 0x80, 0xff} {
			b := bytes.Clone(good)
			b[i] ^= x
			f(fmt.Sprintf("byte %d ^ %#x", i, x), b)
			n++
		}
	}
	for k := 0; k < len(good); k++ {
		f(fmt.Sprintf("truncated to %d", k), good[:k])
		n++
	}
	f("one byte appended", append(bytes.Clone(good), 0))
	return n + 1
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
	tried := eachDamage(good, func(what string, b []byte) {
		t.Helper()
		os.WriteFile(path, b, 0o600)
		if _, err := readStream(s, 1); !errors.Is(err, ErrCorrupt) {
			t.Fatalf("%s: error %v, want ErrCorrupt", what, err)
		}
	})
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

// TestGenerationsFenceStaleWriters: in a consumer group a partition's
// checkpoints carry the generation of the instance that owned it. A
// generation's versions are a band of their own (g·2³² + 1, + 2, …), so the
// newest version is the newest owner's; a writer of an older generation is
// refused before it writes (ErrFenced), and one that a newer owner overtakes
// while it writes removes what it wrote and is refused too. The newer
// owner's state stays the newest throughout.
func TestGenerationsFenceStaleWriters(t *testing.T) {
	hook := &hookFS{}
	s := openTest(t, StoreConfig{FS: hook})
	write := func(g int64, owner string) (Info, error) {
		m := manifest(int64(g))
		m.Generation, m.Owner = g, owner
		return s.Write(m, testSections(1))
	}
	a1, err := write(3, "a")
	if err != nil || a1.Version != 3<<32+1 || a1.Generation != 3 || a1.Owner != "a" {
		t.Fatalf("first write of generation 3: %+v, %v", a1, err)
	}
	if a2, _ := write(3, "a"); a2.Version != 3<<32+2 {
		t.Fatalf("second write of generation 3: version %d", a2.Version)
	}
	b, err := write(4, "b")
	if err != nil || b.Version != 4<<32+1 {
		t.Fatalf("the new owner's write: %+v, %v", b, err)
	}
	if _, err := write(3, "a"); !errors.Is(err, ErrFenced) {
		t.Fatalf("the old owner's write after the new one: %v, want ErrFenced", err)
	}
	// In a store of generation 3 only, the old owner passes the check; the
	// new owner writes while the old one's file is being written.
	hook2 := &hookFS{}
	s2 := openTest(t, StoreConfig{FS: hook2})
	write2 := func(g int64, owner string) (Info, error) {
		m := manifest(int64(g))
		m.Generation, m.Owner = g, owner
		return s2.Write(m, testSections(1))
	}
	if _, err := write2(3, "a"); err != nil {
		t.Fatal(err)
	}
	var newer Info
	hook2.onCreate = func() {
		hook2.onCreate = nil
		other := openTest(t, StoreConfig{Dir: s2.Dir()})
		m := manifest(4)
		m.Generation, m.Owner = 4, "b"
		var err error
		if newer, err = other.Write(m, testSections(1)); err != nil {
			t.Errorf("the new owner's write during the old one's: %v", err)
		}
	}
	if _, err := write2(3, "a"); !errors.Is(err, ErrFenced) {
		t.Fatalf("the overtaken write: %v, want ErrFenced", err)
	}
	c, _, err := s2.Latest()
	if err != nil || c.Manifest.Owner != "b" || c.Manifest.Version != newer.Version {
		t.Fatalf("newest: %+v, %v; want the new owner's", c.Info, err)
	}
	vs, _ := s2.Versions()
	if len(vs) != 2 || vs[0] != 3<<32+1 || vs[1] != 4<<32+1 {
		t.Errorf("versions %v, want the old owner's first and the new owner's", vs)
	}
}

// hookFS calls onCreate when a file is created.
type hookFS struct {
	OSFS
	onCreate func()
}

func (h *hookFS) Create(path string) (File, error) {
	if f := h.onCreate; f != nil {
		f()
	}
	return h.OSFS.Create(path)
}
