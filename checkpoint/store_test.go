package checkpoint

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"
)

func openTest(t *testing.T, cfg StoreConfig) *Store {
	t.Helper()
	if cfg.Dir == "" {
		cfg.Dir = t.TempDir()
	}
	cfg.Now = func() time.Time { return time.Date(2026, 12, 1, 12, 0, 0, 0, time.UTC) }
	s, err := OpenStore(cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { s.Close() })
	return s
}

func testSections(n int) []Section {
	secs := []Section{{Global: true, Bytes: bytes.Repeat([]byte("global state "), 20)}}
	for p := 0; p < n; p++ {
		secs = append(secs, Section{Partition: int32(p), Bytes: bytes.Repeat([]byte(fmt.Sprintf("partition %d ", p)), 50+p)})
	}
	return secs
}

func manifest(events int64) Manifest {
	return Manifest{Reason: Periodic, Events: events, ConfigSHA256: strings.Repeat("ab", 32),
		Positions: []Position{{0, events}}}
}

func TestWriteLoadRoundTrip(t *testing.T) {
	s := openTest(t, StoreConfig{})
	secs := testSections(3)
	info, err := s.Write(manifest(10), secs)
	if err != nil {
		t.Fatal(err)
	}
	// The state digest is SHA-256 over the raw sections in order, computed
	// here with crypto/sha256 directly.
	h := sha256.New()
	var raw int64
	for _, sec := range secs {
		h.Write(sec.Bytes)
		raw += int64(len(sec.Bytes))
	}
	if want := hex.EncodeToString(h.Sum(nil)); info.StateSHA256 != want || info.RawBytes != raw || info.Version != 1 {
		t.Errorf("info %+v, want digest %s raw %d version 1", info, want, raw)
	}
	if info.Bytes >= info.RawBytes {
		t.Errorf("file of %d bytes is not smaller than its %d raw bytes", info.Bytes, info.RawBytes)
	}
	c, err := s.Load(1)
	if err != nil {
		t.Fatal(err)
	}
	if len(c.Sections) != len(secs) {
		t.Fatalf("%d sections, want %d", len(c.Sections), len(secs))
	}
	for i := range secs {
		if !bytes.Equal(c.Sections[i].Bytes, secs[i].Bytes) || c.Sections[i].Global != secs[i].Global || c.Sections[i].Partition != secs[i].Partition {
			t.Errorf("section %d differs after the round trip", i)
		}
	}
	if c.Manifest.Reason != Periodic || c.Manifest.Events != 10 || !c.Manifest.Created.Equal(time.Date(2026, 12, 1, 12, 0, 0, 0, time.UTC)) {
		t.Errorf("manifest %+v", c.Manifest)
	}
	part, err := s.LoadSections(1, []int32{2})
	if err != nil || len(part.Sections) != 2 || part.Sections[1].Partition != 2 || !bytes.Equal(part.Sections[1].Bytes, secs[3].Bytes) {
		t.Errorf("LoadSections(2): %v, %d sections", err, len(part.Sections))
	}
	info2, err := s.Write(manifest(20), secs)
	if err != nil || info2.Version != 2 || FileName(2) != "ckpt-00000000000000000002.tdmk" {
		t.Errorf("second write: %+v %v", info2, err)
	}
	st, err := os.Stat(filepath.Join(s.Dir(), FileName(2)))
	if err != nil || st.Mode().Perm() != 0o600 {
		t.Errorf("file mode %v, want 0600", st.Mode().Perm())
	}
}

// TestCorruptionMatrix: every single-byte change and every truncation of a
// small checkpoint is an error wrapping ErrCorrupt — never a panic, never a
// load.
func TestCorruptionMatrix(t *testing.T) {
	s := openTest(t, StoreConfig{})
	if _, err := s.Write(manifest(5), testSections(2)); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(s.Dir(), FileName(1))
	good, _ := os.ReadFile(path)
	tried := eachDamage(good, func(what string, b []byte) {
		t.Helper()
		os.WriteFile(path, b, 0o600)
		_, err := s.Load(1)
		if !errors.Is(err, ErrCorrupt) {
			t.Fatalf("%s: error %v, want ErrCorrupt", what, err)
		}
	})
	t.Logf("%d corrupted copies of a %d-byte checkpoint, all refused", tried, len(good))
	os.WriteFile(path, good, 0o600)
	if _, err := s.Load(1); err != nil {
		t.Fatalf("the restored good file fails: %v", err)
	}
}

func TestCorruptErrorsNameFileAndOffset(t *testing.T) {
	s := openTest(t, StoreConfig{})
	s.Write(manifest(5), testSections(1))
	path := filepath.Join(s.Dir(), FileName(1))
	good, _ := os.ReadFile(path)
	b := bytes.Clone(good)
	b[len(b)/2] ^= 1
	os.WriteFile(path, b, 0o600)
	_, err := s.Load(1)
	if !errors.Is(err, ErrChecksum) || !strings.Contains(err.Error(), FileName(1)) || !strings.Contains(err.Error(), "byte ") {
		t.Errorf("flipped byte: %v, want ErrChecksum naming the file and offset", err)
	}
	os.WriteFile(path, good[:len(good)-10], 0o600)
	if _, err := s.Load(1); !errors.Is(err, ErrTruncated) {
		t.Errorf("truncated: %v, want ErrTruncated", err)
	}
	if _, err := s.Load(9); !errors.Is(err, ErrNotFound) {
		t.Errorf("missing version: %v, want ErrNotFound", err)
	}
}

func TestLatestSkipsCorruptAndLeavesItInPlace(t *testing.T) {
	s := openTest(t, StoreConfig{})
	for i := 1; i <= 3; i++ {
		s.Write(manifest(int64(i)), testSections(1))
	}
	path := filepath.Join(s.Dir(), FileName(3))
	b, _ := os.ReadFile(path)
	b[30] ^= 0xff
	os.WriteFile(path, b, 0o600)
	c, skipped, err := s.Latest()
	if err != nil || c.Manifest.Version != 2 || len(skipped) != 1 || !errors.Is(skipped[0], ErrCorrupt) {
		t.Fatalf("Latest: version %v skipped %v err %v; want 2, one corrupt skipped", c, skipped, err)
	}
	if after, _ := os.ReadFile(path); !bytes.Equal(after, b) {
		t.Error("the corrupt file was changed")
	}
	// The next write takes version 4: a corrupt file's version is never reused.
	if info, _ := s.Write(manifest(4), testSections(1)); info.Version != 4 {
		t.Errorf("next version %d, want 4", info.Version)
	}
	list, _ := s.List()
	if len(list) != 4 || list[2].Error == "" || list[3].Error != "" {
		t.Errorf("list %+v", list)
	}
}

func TestRetentionKeepsNewestAndPinned(t *testing.T) {
	s := openTest(t, StoreConfig{Retain: 3})
	for i := 1; i <= 4; i++ {
		s.Write(manifest(int64(i)), testSections(1))
	}
	if err := s.Pin(2); err != nil {
		t.Fatal(err)
	}
	for i := 5; i <= 8; i++ {
		s.Write(manifest(int64(i)), testSections(1))
	}
	var got []uint64
	list, _ := s.List()
	for _, in := range list {
		got = append(got, in.Version)
		if in.Version == 2 && !in.Pinned {
			t.Error("version 2 not reported pinned")
		}
	}
	if fmt.Sprint(got) != "[2 6 7 8]" {
		t.Errorf("versions kept %v, want [2 6 7 8] (newest 3 and the pinned one)", got)
	}
	s.Unpin(2)
	s.Write(manifest(9), testSections(1))
	list, _ = s.List()
	if len(list) != 3 || list[0].Version != 7 {
		t.Errorf("after unpin: %+v", list)
	}
	if err := s.Pin(42); !errors.Is(err, ErrNotFound) {
		t.Errorf("pin of a missing version: %v", err)
	}
}

// failFS injects failures into writes: after budget bytes the write fails
// with ENOSPC, as a full disk does.
type failFS struct {
	OSFS
	budget int
}

type failFile struct {
	File
	fs *failFS
}

func (f *failFS) Create(path string) (File, error) {
	file, err := f.OSFS.Create(path)
	if err != nil {
		return nil, err
	}
	return &failFile{file, f}, nil
}

func (f *failFile) Write(p []byte) (int, error) {
	if len(p) > f.fs.budget {
		n, _ := f.File.Write(p[:f.fs.budget])
		f.fs.budget = 0
		return n, &os.PathError{Op: "write", Path: "checkpoint", Err: syscall.ENOSPC}
	}
	f.fs.budget -= len(p)
	return f.File.Write(p)
}

func TestDiskFullLeavesEarlierVersionsIntact(t *testing.T) {
	dir := t.TempDir()
	ffs := &failFS{budget: 1 << 30}
	s := openTest(t, StoreConfig{Dir: dir, FS: ffs})
	if _, err := s.Write(manifest(1), testSections(2)); err != nil {
		t.Fatal(err)
	}
	ffs.budget = 100 // the next write runs out of space midway
	_, err := s.Write(manifest(2), testSections(2))
	if !errors.Is(err, syscall.ENOSPC) || !strings.Contains(err.Error(), "version 2") {
		t.Fatalf("write on a full disk: %v, want ENOSPC naming version 2", err)
	}
	var names []string // besides the writers' LOCK file
	ents, _ := os.ReadDir(dir)
	for _, e := range ents {
		if e.Name() != lockName {
			names = append(names, e.Name())
		}
	}
	if len(names) != 1 || names[0] != FileName(1) {
		t.Errorf("directory holds %v, want only version 1", names)
	}
	if c, _, err := s.Latest(); err != nil || c.Manifest.Version != 1 {
		t.Errorf("Latest after a failed write: %v %v", c, err)
	}
	ffs.budget = 1 << 30
	if info, err := s.Write(manifest(2), testSections(2)); err != nil || info.Version != 2 {
		t.Errorf("write after space returns: %+v %v", info, err)
	}
}

func TestLeftoverTempFileIgnoredAndCleaned(t *testing.T) {
	dir := t.TempDir()
	s := openTest(t, StoreConfig{Dir: dir})
	s.Write(manifest(1), testSections(1))
	tmp := filepath.Join(dir, FileName(2)+tmpMark+"deadbeef")
	os.WriteFile(tmp, []byte("half a checkpoint"), 0o600)
	if c, _, err := s.Latest(); err != nil || c.Manifest.Version != 1 {
		t.Fatalf("Latest with a temp file present: %v %v", c, err)
	}
	list, _ := s.List()
	if len(list) != 1 {
		t.Errorf("list shows %d checkpoints, want 1 (the temp file is not one)", len(list))
	}
	// While a writer has the store open, its temporary files may be in
	// flight: neither a read-only open nor a second writer touches them.
	openTest(t, StoreConfig{Dir: dir, ReadOnly: true})
	second := openTest(t, StoreConfig{Dir: dir})
	if _, err := os.Stat(tmp); err != nil {
		t.Errorf("temp file removed while a writer had the store open: %v", err)
	}
	second.Close()
	// Once no writer has it open, the next writer cleans up.
	s.Close()
	openTest(t, StoreConfig{Dir: dir})
	if _, err := os.Stat(tmp); !os.IsNotExist(err) {
		t.Errorf("temp file still there after reopening: %v", err)
	}
}

// TestReadOnlyChangesNothing: a read-only open of a missing directory fails
// with ErrNoStore and creates nothing; on a store it refuses every change.
func TestReadOnlyChangesNothing(t *testing.T) {
	missing := filepath.Join(t.TempDir(), "nothing-here")
	if _, err := OpenStore(StoreConfig{Dir: missing, ReadOnly: true}); !errors.Is(err, ErrNoStore) {
		t.Errorf("read-only open of a missing directory: %v, want ErrNoStore", err)
	}
	if _, err := os.Stat(missing); !os.IsNotExist(err) {
		t.Errorf("read-only open created %s", missing)
	}
	dir := t.TempDir()
	w := openTest(t, StoreConfig{Dir: dir})
	w.Write(manifest(1), testSections(1))
	w.Close()
	os.Remove(filepath.Join(dir, lockName))
	r := openTest(t, StoreConfig{Dir: dir, ReadOnly: true})
	if _, err := r.Write(manifest(2), testSections(1)); !errors.Is(err, ErrReadOnly) {
		t.Errorf("write on a read-only store: %v", err)
	}
	if err := r.Pin(1); !errors.Is(err, ErrReadOnly) {
		t.Errorf("pin on a read-only store: %v", err)
	}
	if list, err := r.List(); err != nil || len(list) != 1 {
		t.Errorf("list: %v %v", list, err)
	}
	if _, err := os.Stat(filepath.Join(dir, lockName)); !os.IsNotExist(err) {
		t.Error("a read-only open created the LOCK file")
	}
}

func TestDecodedSizeLimit(t *testing.T) {
	dir := t.TempDir()
	w := openTest(t, StoreConfig{Dir: dir})
	// 4 MiB of zeros compress to a few hundred bytes: a small file that
	// decodes large, the shape of a decompression bomb.
	big := []Section{{Global: true, Bytes: make([]byte, 4<<20)}}
	if _, err := w.Write(manifest(1), big); err != nil {
		t.Fatal(err)
	}
	r := openTest(t, StoreConfig{Dir: dir, MaxRawBytes: 1 << 20})
	_, err := r.Load(1)
	if !errors.Is(err, ErrTooLarge) {
		t.Errorf("load past the limit: %v, want ErrTooLarge", err)
	}
}

// TestWriteRefusesWhatLoadWouldRefuse: a state larger than the decoded-size
// limit is not written (it could never be loaded), with ErrTooLarge; earlier
// versions are intact.
func TestWriteRefusesWhatLoadWouldRefuse(t *testing.T) {
	s := openTest(t, StoreConfig{MaxRawBytes: 1 << 20})
	if _, err := s.Write(manifest(1), testSections(1)); err != nil {
		t.Fatal(err)
	}
	big := []Section{{Global: true, Bytes: make([]byte, 2<<20)}}
	if _, err := s.Write(manifest(2), big); !errors.Is(err, ErrTooLarge) {
		t.Errorf("writing 2 MiB of state past a 1 MiB limit: %v, want ErrTooLarge", err)
	}
	if vs, _ := s.Versions(); len(vs) != 1 {
		t.Errorf("versions %v after the refused write, want [1]", vs)
	}
}

// TestWriteStateStreams: a state handed over in small pieces, as the engine
// streams it key by key, is stored and loads back byte for byte, with the
// digest of the whole; a state that passes the limit part-way is refused
// and leaves nothing behind, not even a temporary file.
func TestWriteStateStreams(t *testing.T) {
	s := openTest(t, StoreConfig{MaxRawBytes: 1 << 20})
	secs := testSections(3)
	in, err := s.WriteState(manifest(7), func(sink Sink) error {
		for _, sec := range secs {
			if err := sink.Begin(sec.Global, sec.Partition); err != nil {
				return err
			}
			for b := sec.Bytes; len(b) > 0; b = b[min(len(b), 7):] {
				if _, err := sink.Write(b[:min(len(b), 7)]); err != nil {
					return err
				}
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	c, err := s.Load(in.Version)
	if err != nil {
		t.Fatal(err)
	}
	if len(c.Sections) != len(secs) || c.Manifest.StateSHA256 != stateDigest(secs) {
		t.Fatalf("loaded %d sections, digest %s; wrote %d, digest %s", len(c.Sections), c.Manifest.StateSHA256, len(secs), stateDigest(secs))
	}
	for i := range secs {
		if !bytes.Equal(c.Sections[i].Bytes, secs[i].Bytes) || c.Sections[i].Partition != secs[i].Partition {
			t.Errorf("section %d differs", i)
		}
	}
	_, err = s.WriteState(manifest(8), func(sink Sink) error {
		sink.Begin(true, 0)
		for i := 0; i < 100; i++ {
			if _, err := sink.Write(make([]byte, 64<<10)); err != nil {
				return err
			}
		}
		t.Error("the sink took 6.4 MiB past a 1 MiB limit")
		return nil
	})
	if !errors.Is(err, ErrTooLarge) {
		t.Errorf("a state past the limit: %v, want ErrTooLarge", err)
	}
	names, _ := os.ReadDir(s.Dir())
	for _, n := range names {
		if strings.Contains(n.Name(), tmpMark) {
			t.Errorf("%s left behind", n.Name())
		}
	}
}

// TestFormatVersion1StillLoads: files of the first format, with the table
// and manifest before the state, are still read and verified.
func TestFormatVersion1StillLoads(t *testing.T) {
	s := openTest(t, StoreConfig{})
	m := manifest(3)
	m.Version, m.Created = 1, time.Date(2026, 12, 1, 0, 0, 0, 0, time.UTC)
	b, err := encodeFile(&m, testSections(2), s.enc.EncodeAll)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(s.Dir(), FileName(1)), b, 0o600); err != nil {
		t.Fatal(err)
	}
	c, err := s.Load(1)
	if err != nil {
		t.Fatalf("a version-1 file: %v", err)
	}
	if c.Manifest.StateSHA256 != stateDigest(testSections(2)) {
		t.Error("a version-1 file loads another state")
	}
	b[len(b)/2] ^= 1
	os.WriteFile(filepath.Join(s.Dir(), FileName(1)), b, 0o600)
	if _, err := s.Load(1); !errors.Is(err, ErrCorrupt) {
		t.Errorf("a damaged version-1 file: %v, want ErrCorrupt", err)
	}
}

// TestDiskFullDuringALargeState: the disk fills while a state many times the
// writer's buffers is still being handed over; the writer must stop and say
// so, not wait for buffers the failed compressor no longer returns.
func TestDiskFullDuringALargeState(t *testing.T) {
	ffs := &failFS{budget: 4 << 20}
	s := openTest(t, StoreConfig{Dir: t.TempDir(), FS: ffs})
	rng := rand.New(rand.NewPCG(1, 1))
	chunk := make([]byte, 256<<10)
	done := make(chan error, 1)
	go func() {
		_, err := s.WriteState(manifest(1), func(sink Sink) error {
			sink.Begin(true, 0)
			for i := 0; i < 200; i++ { // 50 MiB of incompressible bytes
				for j := range chunk {
					chunk[j] = byte(rng.Uint32())
				}
				if _, err := sink.Write(chunk); err != nil {
					return err
				}
			}
			return nil
		})
		done <- err
	}()
	select {
	case err := <-done:
		if !errors.Is(err, syscall.ENOSPC) {
			t.Errorf("a full disk during a large state: %v, want ENOSPC", err)
		}
	case <-time.After(60 * time.Second):
		t.Fatal("the writer hung after the disk filled")
	}
}

// TestDiskFullAtAnyPoint: whatever byte the disk fills at — inside a
// section's frame or where one ends — a write of many sections stops with
// the error instead of waiting.
func TestDiskFullAtAnyPoint(t *testing.T) {
	secs := []Section{{Global: true, Bytes: []byte("global")}}
	rng := rand.New(rand.NewPCG(2, 2))
	for p := 0; p < 300; p++ {
		b := make([]byte, 3000+rng.IntN(3000))
		for j := range b {
			b[j] = byte(rng.Uint32())
		}
		secs = append(secs, Section{Partition: int32(p), Bytes: b})
	}
	for budget := 10; budget < 1<<20; budget = budget*5/4 + 7 {
		ffs := &failFS{budget: budget}
		s := openTest(t, StoreConfig{Dir: t.TempDir(), FS: ffs})
		done := make(chan error, 1)
		go func() { _, err := s.Write(manifest(1), secs); done <- err }()
		select {
		case err := <-done:
			if !errors.Is(err, syscall.ENOSPC) {
				t.Fatalf("disk full after %d bytes: %v, want ENOSPC", budget, err)
			}
		case <-time.After(30 * time.Second):
			t.Fatalf("disk full after %d bytes: the writer hung", budget)
		}
	}
}
