package checkpoint

import (
	"bufio"
	"crypto/rand"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"hash"
	"hash/crc32"
	"io"
	"path/filepath"
	"sync/atomic"

	"github.com/klauspost/compress/zstd"
)

// Writing a checkpoint: Store.Write and Store.WriteState, and the streaming
// writer of format 2 (see the package doc).

// Write stores a new checkpoint of the given sections and returns its info;
// see WriteState.
func (s *Store) Write(m Manifest, secs []Section) (Info, error) {
	if len(secs) == 0 {
		return Info{}, fmt.Errorf("checkpoint: no sections to write")
	}
	return s.WriteState(m, func(sink Sink) error {
		for _, sec := range secs {
			if err := sink.Begin(sec.Global, sec.Partition); err != nil {
				return err
			}
			if _, err := sink.Write(sec.Bytes); err != nil {
				return err
			}
		}
		return nil
	})
}

// Sink receives a state section by section: Begin starts a section (the
// global one first), Write appends its bytes.
type Sink interface {
	Begin(global bool, partition int32) error
	Write(p []byte) (int, error)
}

// WriteState stores a new checkpoint whose state emit writes into the sink
// it is given, and returns its info. The state is compressed and written to
// disk as it arrives, never held in memory whole; it is refused, with an
// error wrapping ErrTooLarge, as soon as it passes the limit loading
// enforces (MaxRawBytes). WriteState assigns the version (one past the
// newest present), the created time (unless set), the state digest and raw
// size. On any failure — a full disk, an error from emit — earlier versions
// are untouched, no partial file is left under a checkpoint name, and the
// error says what failed.
func (s *Store) WriteState(m Manifest, emit func(Sink) error) (Info, error) {
	if s.cfg.ReadOnly {
		return Info{}, fmt.Errorf("%w: cannot write a checkpoint in %s", ErrReadOnly, s.cfg.Dir)
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	vs, pins, err := s.scan()
	if err != nil {
		return Info{}, err
	}
	m.Version = 1
	if len(vs) > 0 {
		m.Version = vs[len(vs)-1] + 1
	}
	if m.Generation < 0 || m.Generation > 1<<31-1 {
		return Info{}, fmt.Errorf("checkpoint: generation %d out of range", m.Generation)
	}
	if g := m.Generation; g > 0 {
		band, next := generationBand(g), generationBand(g+1)
		if len(vs) > 0 && vs[len(vs)-1] >= next {
			return Info{}, fenced(s.cfg.Dir, g, vs[len(vs)-1])
		}
		m.Version = max(m.Version, band+1)
	}
	if m.Created.IsZero() {
		m.Created = s.cfg.Now().UTC()
	}
	if _, err := ParseReason(string(m.Reason)); err != nil {
		return Info{}, err
	}
	name := FileName(m.Version)
	final := filepath.Join(s.cfg.Dir, name)
	var rnd [6]byte
	rand.Read(rnd[:])
	tmp := final + tmpMark + hex.EncodeToString(rnd[:])
	size, err := s.writeStream(tmp, &m, emit)
	if err == nil {
		err = s.cfg.FS.Rename(tmp, final)
	}
	if err != nil {
		s.cfg.FS.Remove(tmp)
		if errors.Is(err, ErrTooLarge) {
			return Info{}, err
		}
		return Info{}, fmt.Errorf("checkpoint: write version %d: %w", m.Version, err)
	}
	if err := s.cfg.FS.SyncDir(s.cfg.Dir); err != nil {
		return Info{}, fmt.Errorf("checkpoint: write version %d: sync directory: %w", m.Version, err)
	}
	if g := m.Generation; g > 0 {
		// A newer owner may have written while this one did: then this
		// version is not the newest and must not stay to be mistaken for a
		// state of the partition's owner.
		if now, _, err := s.scan(); err == nil && len(now) > 0 && now[len(now)-1] >= generationBand(g+1) {
			s.cfg.FS.Remove(final)
			s.cfg.FS.SyncDir(s.cfg.Dir)
			return Info{}, fenced(s.cfg.Dir, g, now[len(now)-1])
		}
	}
	vs = append(vs, m.Version)
	s.retain(vs, pins)
	in := info(&m, name, size, pins[m.Version])
	s.remember(in)
	return in, nil
}

// fenced is the error of a write of generation g in dir, where version
// newest, of a later generation, is.
func fenced(dir string, g int64, newest uint64) error {
	return fmt.Errorf("%w: %s holds version %d, of generation %d; the writer, of generation %d, lost the partition to it and wrote nothing",
		ErrFenced, dir, newest, newest>>32, g)
}

// writeStream writes a format-2 file at path (see FormatVersion), syncs and
// closes it, and returns its size. It fills in m's digest and raw size.
func (s *Store) writeStream(path string, m *Manifest, emit func(Sink) error) (int64, error) {
	f, err := s.cfg.FS.Create(path)
	if err != nil {
		return 0, err
	}
	w := &streamWriter{f: f, crc: crc32.New(castagnoli), digest: sha256.New(), max: s.cfg.MaxRawBytes, enc: s.enc}
	w.out = bufio.NewWriterSize(io.MultiWriter(f, w.crc), 1<<20)
	err = w.run(m, emit)
	if w.syncing != nil {
		<-w.syncing
		if err == nil {
			err = w.syncErr
		}
	}
	if err == nil {
		err = f.Sync()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	return w.n, err
}

// streamWriter is the Sink of WriteState. The caller's goroutine counts the
// raw bytes and copies them into chunks; a second goroutine hashes them (the
// state digest); a third compresses them, one zstd frame per section, and
// writes the frames to the file under a running CRC-32C. Encoding, hashing
// and compressing each cost about a third of a write: on separate goroutines
// they overlap however many cores there are. Every syncEvery bytes written it starts a sync in
// the background, so that the disk works while the state is still being
// encoded and the final sync finds little left to do.
type streamWriter struct {
	f       File
	out     *bufio.Writer
	crc     hash.Hash32
	n       int64 // bytes written to the file (second goroutine until done)
	enc     *zstd.Encoder
	digest  hash.Hash
	raw     int64 // raw bytes of the whole state
	max     int64
	entries []entry // appended by Begin
	open    bool
	cur     []byte

	toHash  chan chunk // to the hashing goroutine
	work    chan chunk // from it to the compressing one
	free    chan []byte
	done    chan error
	failed  atomic.Bool
	synced  int64         // file offset at the last background sync
	syncing chan struct{} // closed when the background sync in flight ends
	syncErr error         // its result, read after syncing is closed
	stored  []uint64      // per section, by the second goroutine
}

// chunk is a piece of work for the second goroutine: raw bytes of the open
// section, or (b nil) the start of the next section.
type chunk struct{ b []byte }

const (
	chunkSize = 1 << 20
	syncEvery = 64 << 20
)

func (w *streamWriter) write(p []byte) error {
	n, err := w.out.Write(p)
	w.n += int64(n)
	if err == nil && w.n-w.synced >= syncEvery && w.syncing == nil {
		// Start the disk on what is written so far. A sync in flight is
		// waited for only at the end.
		if err = w.out.Flush(); err == nil {
			w.synced = w.n
			done := make(chan struct{})
			w.syncing = done
			go func() {
				// An error here must not be lost: a failed sync may
				// clear the error a later one would report.
				w.syncErr = w.f.Sync()
				close(done)
			}()
		}
	} else if w.syncing != nil {
		select {
		case <-w.syncing:
			w.syncing = nil
			err = w.syncErr
		default:
		}
	}
	return err
}

// fileSide is the frames' destination: the file.
type fileSide struct{ w *streamWriter }

func (f fileSide) Write(p []byte) (int, error) {
	if err := f.w.write(p); err != nil {
		return 0, err
	}
	return len(p), nil
}

// hash is the second goroutine: it hashes the chunks (the state digest) and
// passes them on, in order, to compress.
func (w *streamWriter) hash() {
	for c := range w.toHash {
		if c.b != nil && !w.failed.Load() {
			w.digest.Write(c.b)
		}
		w.work <- c
	}
	close(w.work)
}

// compress is the third goroutine. It records each section's stored length
// in stored (read by run once it is done).
func (w *streamWriter) compress() {
	var err error
	start := int64(0)
	open := false
	end := func() {
		if open && err == nil {
			if err = w.enc.Close(); err != nil {
				w.failed.Store(true)
			}
			w.stored = append(w.stored, uint64(w.n-start))
		}
	}
	for c := range w.work {
		if err != nil { // drain: the caller stops at its next Write
			if c.b != nil {
				w.free <- c.b[:0]
			}
			continue
		}
		if c.b == nil {
			end()
			start, open = w.n, true
			w.enc.Reset(fileSide{w})
			continue
		}
		if _, err = w.enc.Write(c.b); err != nil {
			w.failed.Store(true)
		}
		w.free <- c.b[:0]
	}
	end()
	if err != nil {
		w.failed.Store(true)
		w.enc.Reset(io.Discard)
	}
	w.done <- err
}

func (w *streamWriter) Begin(global bool, partition int32) error {
	if err := w.flush(); err != nil {
		return err
	}
	if global != (len(w.entries) == 0) {
		return fmt.Errorf("checkpoint: the global section must come first, once")
	}
	w.entries = append(w.entries, entry{global: global, partition: partition})
	w.open = true
	w.toHash <- chunk{}
	return nil
}

// cur is the chunk being filled; it goes to the second goroutine when full.
func (w *streamWriter) Write(p []byte) (int, error) {
	if !w.open {
		return 0, fmt.Errorf("checkpoint: state bytes before the first section")
	}
	if w.failed.Load() {
		return 0, fmt.Errorf("checkpoint: writing the file failed")
	}
	if w.raw += int64(len(p)); w.raw > w.max {
		return 0, fmt.Errorf("%w: the state passed %d bytes, the limit that loading enforces (StoreConfig.MaxRawBytes); "+
			"it was not written, earlier versions are intact", ErrTooLarge, w.max)
	}
	w.entries[len(w.entries)-1].raw += uint64(len(p))
	n := len(p)
	for len(p) > 0 {
		if w.cur == nil {
			w.cur = <-w.free
		}
		k := min(len(p), chunkSize-len(w.cur))
		w.cur = append(w.cur, p[:k]...)
		p = p[k:]
		if len(w.cur) == chunkSize {
			w.toHash <- chunk{b: w.cur}
			w.cur = nil
		}
	}
	return n, nil
}

// flush hands the chunk being filled to the second goroutine.
func (w *streamWriter) flush() error {
	if len(w.cur) > 0 {
		w.toHash <- chunk{b: w.cur}
		w.cur = nil
	}
	return nil
}

func (w *streamWriter) run(m *Manifest, emit func(Sink) error) error {
	w.write([]byte(magic))
	w.write(binary.LittleEndian.AppendUint32(nil, FormatVersion))
	w.toHash, w.work, w.free, w.done = make(chan chunk, 2), make(chan chunk, 2), make(chan []byte, 6), make(chan error, 1)
	for i := 0; i < cap(w.free); i++ {
		w.free <- make([]byte, 0, chunkSize)
	}
	go w.hash()
	go w.compress()
	err := emit(w)
	if err == nil {
		err = w.flush()
	}
	close(w.toHash)
	if cerr := <-w.done; cerr != nil {
		err = cerr // what went wrong with the file, rather than that it did
	}
	if err != nil {
		return err
	}
	if len(w.entries) == 0 || len(w.stored) != len(w.entries) {
		return fmt.Errorf("checkpoint: no sections to write")
	}
	for i := range w.entries {
		w.entries[i].stored = w.stored[i]
	}
	m.StateSHA256 = hex.EncodeToString(w.digest.Sum(nil))
	m.RawBytes = w.raw
	man, err := json.Marshal(m)
	if err != nil {
		return fmt.Errorf("checkpoint: manifest: %w", err)
	}
	var b []byte
	for _, e := range w.entries {
		kind := byte(kindPartiton)
		if e.global {
			kind = kindGlobal
		}
		b = append(b, kind)
		b = binary.LittleEndian.AppendUint32(b, uint32(e.partition))
		b = binary.LittleEndian.AppendUint64(b, e.raw)
		b = binary.LittleEndian.AppendUint64(b, e.stored)
	}
	b = append(b, man...)
	b = binary.LittleEndian.AppendUint32(b, uint32(len(w.entries)))
	b = binary.LittleEndian.AppendUint32(b, uint32(len(man)))
	b = binary.LittleEndian.AppendUint64(b, uint64(w.n)+uint64(len(b))+8+trailerLen)
	if err := w.write(b); err != nil {
		return err
	}
	if err := w.out.Flush(); err != nil {
		return err
	}
	// The CRC covers what was flushed; the trailer goes after it.
	if err := w.write(binary.LittleEndian.AppendUint32(nil, w.crc.Sum32())); err != nil {
		return err
	}
	return w.out.Flush()
}
