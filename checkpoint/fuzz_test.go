package checkpoint

import (
	"bytes"
	"errors"
	"os"
	"path/filepath"
	"testing"
)

// FuzzDecode feeds arbitrary bytes to the checkpoint decoder: it must return
// an error or a verified checkpoint, never panic, hang or allocate beyond the
// decoded-size limit. Seeds: the golden version-1 file and its hostile copies
// in testdata, and a version-2 file written here.
func FuzzDecode(f *testing.F) {
	for _, pattern := range []string{"../testdata/checkpoint-v1/*.tdmk", "../testdata/checkpoint-hostile/*.tdmk"} {
		paths, _ := filepath.Glob(pattern)
		for _, p := range paths {
			b, err := os.ReadFile(p)
			if err != nil {
				f.Fatal(err)
			}
			f.Add(b)
		}
	}
	s, err := OpenStore(StoreConfig{Dir: f.TempDir(), MaxRawBytes: 8 << 20})
	if err != nil {
		f.Fatal(err)
	}
	// A file of the format this build writes (version 2).
	in, err := s.Write(Manifest{Reason: Manual, ConfigSHA256: "ab"}, []Section{{Global: true, Bytes: []byte("global")}, {Partition: 3, Bytes: []byte("keys of partition 3")}})
	if err != nil {
		f.Fatal(err)
	}
	if b, err := os.ReadFile(filepath.Join(s.Dir(), in.File)); err == nil {
		f.Add(b)
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		c, err := s.decode("fuzz", b, nil)
		if err == nil && c.Manifest.StateSHA256 != stateDigest(c.Sections) {
			t.Fatal("a checkpoint decoded whose state digest does not match")
		}
		if err != nil && !errors.Is(err, ErrCorrupt) {
			t.Fatalf("error %v does not wrap ErrCorrupt", err)
		}
		// Read as a stream (how a service loads), the same bytes get the
		// same verdict and, when good, the same sections.
		secs, serr := streamBytes(s, b)
		switch {
		case err == nil && serr != nil:
			t.Fatalf("whole, the file is good; as a stream: %v", serr)
		case err != nil && serr == nil:
			t.Fatalf("whole, the file is refused (%v); as a stream it passed", err)
		case serr != nil && !errors.Is(serr, ErrCorrupt):
			t.Fatalf("stream error %v does not wrap ErrCorrupt", serr)
		case err == nil && stateDigest(secs) != stateDigest(c.Sections):
			t.Fatal("as a stream, other sections")
		}
	})
}

func TestHostileCopiesRefused(t *testing.T) {
	s := openTest(t, StoreConfig{})
	paths, _ := filepath.Glob("../testdata/checkpoint-hostile/*.tdmk")
	if len(paths) < 4 {
		t.Fatalf("found %d hostile copies in testdata", len(paths))
	}
	for _, p := range paths {
		b, _ := os.ReadFile(p)
		if _, err := s.decode(filepath.Base(p), b, nil); !errors.Is(err, ErrCorrupt) {
			t.Errorf("%s: %v, want ErrCorrupt", p, err)
		}
	}
}

// memFile is a file held in memory, for Store.stream.
type memFile struct{ *bytes.Reader }

func (memFile) Close() error { return nil }

// streamBytes reads the checkpoint file b through the stream reader and
// returns its sections and the verdict.
func streamBytes(s *Store, b []byte) ([]Section, error) {
	st, err := s.stream("fuzz", memFile{bytes.NewReader(b)})
	if err != nil {
		return nil, err
	}
	secs, _, err := readAll(st)
	return secs, err
}
