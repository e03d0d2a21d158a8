package checkpoint

import (
	"crypto/sha256"
	"errors"
	"fmt"
	"io/fs"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/klauspost/compress/zstd"
)

// Defaults of StoreConfig.
const (
	DefaultRetain = 20
	// DefaultMaxRawBytes bounds a checkpoint's decoded state: 16 GiB, room
	// for some 15 million keys of rls + mean (10⁶ such keys encode to
	// 1.05 GB), as the engine can hold that many on a large machine. A
	// file's CRC-32C is checked before anything is decompressed, so damage
	// never reaches the decompressor; a file crafted to pass it can make a
	// load allocate up to this limit, no more.
	DefaultMaxRawBytes = 16 << 30
)

// StoreConfig configures a Store. Zero fields take the defaults.
type StoreConfig struct {
	Dir         string           // the directory; created 0700 if missing. Required.
	Retain      int              // newest versions kept, besides pinned ones. Default: DefaultRetain.
	MaxRawBytes int64            // limit on a checkpoint's decoded state. Default: DefaultMaxRawBytes.
	FS          FS               // Default: OSFS.
	Now         func() time.Time // clock for Manifest.Created. Default: time.Now.
	// ReadOnly opens the store for inspection: it creates nothing, removes
	// nothing and takes no lock, and Write, Pin and Unpin return ErrReadOnly.
	// A missing directory is ErrNoStore. Default: false.
	ReadOnly bool
}

// Validate reports every problem with c. It changes nothing.
func (c *StoreConfig) Validate() error {
	var errs []error
	if c.Dir == "" {
		errs = append(errs, errors.New("checkpoint: no directory given"))
	}
	if c.Retain < 0 {
		errs = append(errs, fmt.Errorf("checkpoint: retain %d is negative", c.Retain))
	}
	if c.MaxRawBytes < 0 {
		errs = append(errs, fmt.Errorf("checkpoint: max raw bytes %d is negative", c.MaxRawBytes))
	}
	return errors.Join(errs...)
}

func (c *StoreConfig) setDefaults() {
	if c.Retain == 0 {
		c.Retain = DefaultRetain
	}
	if c.MaxRawBytes == 0 {
		c.MaxRawBytes = DefaultMaxRawBytes
	}
	if c.FS == nil {
		c.FS = OSFS{}
	}
	if c.Now == nil {
		c.Now = time.Now
	}
}

// Info describes a stored checkpoint: the fields `checkpoints list --json`
// and GET /v1/checkpoints print.
type Info struct {
	Version     uint64     `json:"version"`
	Parent      uint64     `json:"parent"`
	Created     time.Time  `json:"created"`
	Position    []Position `json:"position"`
	Events      int64      `json:"events"`
	EventTimes  *TimeRange `json:"event_times,omitempty"` // see Manifest.EventTimes
	StateSHA256 string     `json:"state_sha256"`
	Bytes       int64      `json:"bytes"`
	RawBytes    int64      `json:"raw_bytes"`
	Reason      Reason     `json:"reason"`
	Pinned      bool       `json:"pinned"`
	Generation  int64      `json:"generation,omitempty"` // see Manifest.Generation
	Owner       string     `json:"owner,omitempty"`
	// Partition is the stream partition a checkpoint of a partition's own
	// store holds (a consumer group's; see Manifest.Generation). The store
	// does not know it; the service sets it when it lists such checkpoints.
	Partition *int32 `json:"partition,omitempty"`
	File      string `json:"file"`
	Error     string `json:"error,omitempty"` // set, and nothing else trusted, when the file fails a check
}

// Checkpoint is a loaded checkpoint: fully verified when it comes from Load,
// all but its state digest when it comes from Open (see Verify).
type Checkpoint struct {
	Manifest Manifest
	Sections []Section
	Info     Info

	file     string
	verified bool
}

// Verify checks the state digest (the SHA-256 of every section's bytes
// against the manifest's state_sha256), once; a mismatch wraps ErrCorrupt
// and ErrChecksum. It reads Sections only, so it may run on another
// goroutine while the caller decodes them.
func (c *Checkpoint) Verify() error {
	if c.verified {
		return nil
	}
	if stateDigest(c.Sections) != c.Manifest.StateSHA256 {
		return corrupt(c.file, 24, ErrChecksum, "state digest does not match state_sha256")
	}
	c.verified = true
	return nil
}

// Verified reports whether Verify has passed (always, after Load).
func (c *Checkpoint) Verified() bool { return c.verified }

// Store is a directory of versioned checkpoints. See the package doc for the
// guarantees. Safe for concurrent use.
type Store struct {
	cfg  StoreConfig
	mu   sync.Mutex
	enc  *zstd.Encoder
	dec  *zstd.Decoder
	lock Locker // shared while open for writing; nil when read-only

	listMu sync.Mutex
	listed map[uint64]listed // manifests read for List, by version
}

// listed is a version's Info as List read it, with the file's size and
// modification time then: a file is never rewritten in place, and one that
// changes (damage, an operator's copy) is read again.
type listed struct {
	info  Info
	size  int64
	mtime time.Time
}

// lockName is the file writers lock (see OpenStore).
const lockName = "LOCK"

// OpenStore opens the store in cfg.Dir. Open for writing, it creates the
// directory if need be and holds a shared lock on its LOCK file until Close;
// a writer that can first take the lock exclusively — no other writer has the
// store open — removes the temporary files a crash left behind. A read-only
// open (cfg.ReadOnly) changes nothing at all, so inspecting commands are safe
// beside a running service.
func OpenStore(cfg StoreConfig) (*Store, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg.setDefaults()
	if cfg.ReadOnly {
		if _, err := cfg.FS.ReadDir(cfg.Dir); err != nil {
			if errors.Is(err, fs.ErrNotExist) {
				return nil, fmt.Errorf("%w in %s: the directory does not exist", ErrNoStore, cfg.Dir)
			}
			return nil, fmt.Errorf("checkpoint: %w", err)
		}
	} else if err := cfg.FS.MkdirAll(cfg.Dir); err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	// The fastest level, without Huffman coding of literals: a state's
	// literals are mostly float bits, which it barely shrinks (the 10⁶-key
	// state's file grew by 31 bytes of 488 MiB), at an eighth of the write.
	enc, err := zstd.NewWriter(nil, zstd.WithEncoderConcurrency(1), zstd.WithEncoderLevel(zstd.SpeedFastest), zstd.WithEncoderCRC(false),
		zstd.WithNoEntropyCompression(true))
	if err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	dec, err := zstd.NewReader(nil, zstd.WithDecoderConcurrency(1), zstd.WithDecoderMaxMemory(uint64(cfg.MaxRawBytes)))
	if err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	s := &Store{cfg: cfg, enc: enc, dec: dec, listed: map[uint64]listed{}}
	if cfg.ReadOnly {
		return s, nil
	}
	lockPath := filepath.Join(cfg.Dir, lockName)
	l, err := cfg.FS.Lock(lockPath, true)
	switch {
	case err == nil:
		s.cleanTemporary()
		if err := l.Share(); err != nil {
			l.Close()
			s.Close()
			return nil, fmt.Errorf("checkpoint: lock %s: %w", lockPath, err)
		}
	case errors.Is(err, ErrLocked):
		// Another writer has the store open: its temporary files may be in
		// flight, so leave them. Its exclusive hold, if any, lasts only
		// while it cleans up.
		for i := 0; ; i++ {
			if l, err = cfg.FS.Lock(lockPath, false); err == nil || !errors.Is(err, ErrLocked) || i == 100 {
				break
			}
			time.Sleep(10 * time.Millisecond)
		}
		if err != nil {
			s.Close()
			return nil, fmt.Errorf("checkpoint: lock %s: %w", lockPath, err)
		}
	default:
		s.Close()
		return nil, fmt.Errorf("checkpoint: lock %s: %w", lockPath, err)
	}
	s.lock = l
	return s, nil
}

// cleanTemporary removes the temporary files of writes a crash interrupted.
// Only a writer holding the exclusive lock calls it.
func (s *Store) cleanTemporary() {
	names, err := s.cfg.FS.ReadDir(s.cfg.Dir)
	if err != nil {
		return
	}
	for _, n := range names {
		if strings.HasPrefix(n, filePrefix) && strings.Contains(n, tmpMark) {
			s.cfg.FS.Remove(filepath.Join(s.cfg.Dir, n)) // failing to remove it is harmless
		}
	}
}

// Close releases the compressors and the lock.
func (s *Store) Close() error {
	s.dec.Close()
	err := s.enc.Close()
	if s.lock != nil {
		err = errors.Join(err, s.lock.Close())
		s.lock = nil
	}
	return err
}

// ReadOnly reports whether the store was opened read-only.
func (s *Store) ReadOnly() bool { return s.cfg.ReadOnly }

// Dir returns the store's directory.
func (s *Store) Dir() string { return s.cfg.Dir }

const (
	filePrefix = "ckpt-"
	fileSuffix = ".tdmk"
	pinSuffix  = ".pin"
	tmpMark    = ".tmp-"
)

// FileName returns the file name of a version.
func FileName(v uint64) string { return fmt.Sprintf("%s%020d%s", filePrefix, v, fileSuffix) }

func pinName(v uint64) string { return fmt.Sprintf("%s%020d%s", filePrefix, v, pinSuffix) }

func parseName(name, suffix string) (uint64, bool) {
	digits, ok := strings.CutPrefix(name, filePrefix)
	if !ok {
		return 0, false
	}
	digits, ok = strings.CutSuffix(digits, suffix)
	if !ok || len(digits) != 20 {
		return 0, false
	}
	v, err := strconv.ParseUint(digits, 10, 64)
	return v, err == nil
}

// scan returns the versions present (ascending) and the pinned set.
func (s *Store) scan() ([]uint64, map[uint64]bool, error) {
	names, err := s.cfg.FS.ReadDir(s.cfg.Dir)
	if err != nil {
		return nil, nil, fmt.Errorf("checkpoint: %w", err)
	}
	var vs []uint64
	pins := map[uint64]bool{}
	for _, n := range names {
		if v, ok := parseName(n, fileSuffix); ok {
			vs = append(vs, v)
		} else if v, ok := parseName(n, pinSuffix); ok {
			pins[v] = true
		}
	}
	slices.Sort(vs)
	return vs, pins, nil
}

func (s *Store) writeFile(path string, b []byte) error {
	f, err := s.cfg.FS.Create(path)
	if err != nil {
		return err
	}
	if _, err := f.Write(b); err != nil {
		f.Close()
		return err
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

// retain removes versions older than the newest Retain that are not pinned.
// Removal failures are left for the next write to retry.
func (s *Store) retain(vs []uint64, pins map[uint64]bool) {
	if len(vs) <= s.cfg.Retain {
		return
	}
	removed := false
	for _, v := range vs[:len(vs)-s.cfg.Retain] {
		if pins[v] {
			continue
		}
		if s.cfg.FS.Remove(filepath.Join(s.cfg.Dir, FileName(v))) == nil {
			removed = true
		}
	}
	if removed {
		s.cfg.FS.SyncDir(s.cfg.Dir)
	}
}

func info(m *Manifest, name string, size int64, pinned bool) Info {
	return Info{Version: m.Version, Parent: m.Parent, Created: m.Created, Position: m.Positions, Events: m.Events,
		StateSHA256: m.StateSHA256, Bytes: size, RawBytes: m.RawBytes, Reason: m.Reason, Pinned: pinned,
		Generation: m.Generation, Owner: m.Owner, EventTimes: m.EventTimes, File: name}
}

// Load reads and verifies version v completely. A file that fails any check
// returns an error wrapping ErrCorrupt; a missing one ErrNotFound.
func (s *Store) Load(v uint64) (*Checkpoint, error) {
	c, err := s.load(v, nil)
	if err == nil {
		err = c.Verify()
	}
	if err != nil {
		s.forget(v)
		return nil, err
	}
	return c, nil
}

// Open is Load without the state digest, which the caller checks with
// Checkpoint.Verify before trusting the state: hashing a large state then
// overlaps with decoding it. Every other check — length, CRC-32C, format,
// sizes, decompression — is done.
func (s *Store) Open(v uint64) (*Checkpoint, error) {
	return s.load(v, nil)
}

// LoadSections is Load that decompresses only the global section and the
// sections of the given partitions; the others are checked by the file CRC
// but not decompressed.
func (s *Store) LoadSections(v uint64, partitions []int32) (*Checkpoint, error) {
	if partitions == nil {
		partitions = []int32{}
	}
	return s.load(v, partitions)
}

func (s *Store) load(v uint64, only []int32) (*Checkpoint, error) {
	name := FileName(v)
	b, err := s.cfg.FS.ReadFile(filepath.Join(s.cfg.Dir, name))
	if errors.Is(err, fs.ErrNotExist) {
		return nil, fmt.Errorf("%w: version %d (%s)", ErrNotFound, v, name)
	}
	if err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	c, err := s.open(name, b, only)
	if err != nil {
		s.forget(v)
		return nil, err
	}
	if c.Manifest.Version != v {
		return nil, corrupt(name, 24, nil, "file of version %d holds version %d", v, c.Manifest.Version)
	}
	_, pins, err := s.scan()
	if err != nil {
		return nil, err
	}
	c.Info = info(&c.Manifest, name, int64(len(b)), pins[v])
	if only == nil {
		s.remember(c.Info)
	}
	return c, nil
}

// remember caches a version's Info for List, with the file's current size
// and modification time.
func (s *Store) remember(in Info) {
	st, err := s.cfg.FS.Stat(filepath.Join(s.cfg.Dir, in.File))
	if err != nil {
		return
	}
	s.listMu.Lock()
	s.listed[in.Version] = listed{in, st.Size(), st.ModTime()}
	s.listMu.Unlock()
}

func (s *Store) forget(v uint64) {
	s.listMu.Lock()
	delete(s.listed, v)
	s.listMu.Unlock()
}

// cached returns a version's cached Info if its file is unchanged.
func (s *Store) cached(v uint64) (Info, bool) {
	s.listMu.Lock()
	l, ok := s.listed[v]
	s.listMu.Unlock()
	if !ok {
		return Info{}, false
	}
	st, err := s.cfg.FS.Stat(filepath.Join(s.cfg.Dir, l.info.File))
	if err != nil || st.Size() != l.size || !st.ModTime().Equal(l.mtime) {
		return Info{}, false
	}
	return l.info, true
}

// decode verifies a checkpoint file's bytes and decompresses its sections
// (only those of the given partitions, with the global one, when only is not nil).
// decode is open, and Verify of the whole state when every section was read.
func (s *Store) decode(name string, b []byte, only []int32) (*Checkpoint, error) {
	c, err := s.open(name, b, only)
	if err == nil && only == nil {
		err = c.Verify()
	}
	if err != nil {
		return nil, err
	}
	return c, nil
}

// open checks and decompresses a file's sections (those of the given
// partitions and the global one, or all when only is nil), all but the
// state digest.
func (s *Store) open(name string, b []byte, only []int32) (*Checkpoint, error) {
	p, err := parseFile(name, b, s.cfg.MaxRawBytes)
	if err != nil {
		return nil, err
	}
	c := &Checkpoint{Manifest: p.manifest, file: name}
	for i, e := range p.entries {
		if only != nil && !e.global && !slices.Contains(only, e.partition) {
			continue
		}
		raw, err := s.dec.DecodeAll(b[e.offset:e.offset+int(e.stored)], make([]byte, 0, e.raw))
		if err != nil {
			return nil, corrupt(name, e.offset, nil, "section %d does not decompress: %v", i, err)
		}
		if uint64(len(raw)) != e.raw {
			return nil, corrupt(name, e.offset, nil, "section %d decompresses to %d bytes, table says %d", i, len(raw), e.raw)
		}
		if e.hasSum && sha256.Sum256(raw) != e.sum {
			return nil, corrupt(name, e.offset, ErrChecksum, "section %d SHA-256 mismatch", i)
		}
		c.Sections = append(c.Sections, Section{Global: e.global, Partition: e.partition, Bytes: raw})
	}
	return c, nil
}

// List returns every checkpoint in the store, oldest first, from its
// manifest: the file's structure and CRC-32C are checked, its state is not
// decompressed (Load and Verify do that). A file that fails has only Version,
// File and Error set. A version's Info is read once and kept (a file is never
// rewritten in place), so listing again costs a directory read.
func (s *Store) List() ([]Info, error) {
	vs, pins, err := s.scan()
	if err != nil {
		return nil, err
	}
	out := make([]Info, 0, len(vs))
	for _, v := range vs {
		in, ok := s.cached(v)
		if !ok {
			name := FileName(v)
			b, err := s.cfg.FS.ReadFile(filepath.Join(s.cfg.Dir, name))
			if errors.Is(err, fs.ErrNotExist) {
				continue // removed by retention since the scan
			}
			if err == nil {
				var p *parsed
				if p, err = parseFile(name, b, s.cfg.MaxRawBytes); err == nil {
					in = info(&p.manifest, name, int64(len(b)), false)
					s.remember(in)
				}
			}
			if err != nil {
				s.forget(v)
				out = append(out, Info{Version: v, File: name, Error: err.Error()})
				continue
			}
		}
		in.Pinned = pins[v]
		out = append(out, in)
	}
	s.listMu.Lock()
	for v := range s.listed {
		if !slices.Contains(vs, v) {
			delete(s.listed, v)
		}
	}
	s.listMu.Unlock()
	return out, nil
}

// Verify loads every version completely, as Load does, and returns each
// one's Info; a file that fails has only Version, File and Error set.
func (s *Store) Verify() ([]Info, error) {
	vs, _, err := s.scan()
	if err != nil {
		return nil, err
	}
	out := make([]Info, 0, len(vs))
	for _, v := range vs {
		c, err := s.Load(v)
		if err != nil {
			out = append(out, Info{Version: v, File: FileName(v), Error: err.Error()})
			continue
		}
		out = append(out, c.Info)
	}
	return out, nil
}

// Latest loads the newest checkpoint that passes every check. Newer files
// that fail are skipped (left in place) and reported in skipped. With no good
// checkpoint the error wraps ErrNotFound.
func (s *Store) Latest() (c *Checkpoint, skipped []error, err error) {
	vs, _, err := s.scan()
	if err != nil {
		return nil, nil, err
	}
	for i := len(vs) - 1; i >= 0; i-- {
		c, err := s.Load(vs[i])
		if err == nil {
			return c, skipped, nil
		}
		skipped = append(skipped, err)
	}
	return nil, skipped, fmt.Errorf("%w: no good checkpoint in %s", ErrNotFound, s.cfg.Dir)
}

// Pin protects version v from retention.
func (s *Store) Pin(v uint64) error { return s.PinFor(v, "") }

// PinFor pins version v and records why (kept in the pin file; "drift" for
// the automatic pin before a drift alarm, "" for an operator's).
func (s *Store) PinFor(v uint64, why string) error {
	if s.cfg.ReadOnly {
		return fmt.Errorf("%w: cannot pin in %s", ErrReadOnly, s.cfg.Dir)
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	vs, pins, err := s.scan()
	if err != nil {
		return err
	}
	if !slices.Contains(vs, v) {
		return fmt.Errorf("%w: version %d", ErrNotFound, v)
	}
	path := filepath.Join(s.cfg.Dir, pinName(v))
	if pins[v] {
		if why != "" {
			return nil // an automatic pin never overrides an existing one
		}
		s.cfg.FS.Remove(path) // the operator's pin replaces an automatic one
	}
	if err := s.writeFile(path, []byte(why)); err != nil {
		return fmt.Errorf("checkpoint: pin version %d: %w", v, err)
	}
	return s.cfg.FS.SyncDir(s.cfg.Dir)
}

// Pins returns every pinned version and why it was pinned.
func (s *Store) Pins() (map[uint64]string, error) {
	_, pins, err := s.scan()
	if err != nil {
		return nil, err
	}
	out := map[uint64]string{}
	for v := range pins {
		b, err := s.cfg.FS.ReadFile(filepath.Join(s.cfg.Dir, pinName(v)))
		if err != nil {
			continue
		}
		out[v] = string(b)
	}
	return out, nil
}

// Unpin lets retention remove version v again.
func (s *Store) Unpin(v uint64) error {
	if s.cfg.ReadOnly {
		return fmt.Errorf("%w: cannot unpin in %s", ErrReadOnly, s.cfg.Dir)
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	err := s.cfg.FS.Remove(filepath.Join(s.cfg.Dir, pinName(v)))
	if err != nil && !errors.Is(err, fs.ErrNotExist) {
		return fmt.Errorf("checkpoint: unpin version %d: %w", v, err)
	}
	return s.cfg.FS.SyncDir(s.cfg.Dir)
}

// Versions returns the versions present, oldest first, from the directory
// listing alone (no file is read).
func (s *Store) Versions() ([]uint64, error) {
	vs, _, err := s.scan()
	return vs, err
}

// ReadManifest returns version v's manifest after checking the file's
// structure and CRC, without decompressing its state.
func (s *Store) ReadManifest(v uint64) (Manifest, error) {
	name := FileName(v)
	b, err := s.cfg.FS.ReadFile(filepath.Join(s.cfg.Dir, name))
	if errors.Is(err, fs.ErrNotExist) {
		return Manifest{}, fmt.Errorf("%w: version %d (%s)", ErrNotFound, v, name)
	}
	if err != nil {
		return Manifest{}, fmt.Errorf("checkpoint: %w", err)
	}
	p, err := parseFile(name, b, s.cfg.MaxRawBytes)
	if err != nil {
		return Manifest{}, err
	}
	return p.manifest, nil
}
