package checkpoint

import (
	"bufio"
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"errors"
	"fmt"
	"hash"
	"hash/crc32"
	"io"
	"io/fs"
	"path/filepath"

	"github.com/klauspost/compress/zstd"
)

// Stream is a checkpoint opened to read its state section by section
// (Store.Stream), so that loading a large state never holds it, or its
// file, in memory whole: the file is read once, in order, decompressed and
// hashed on a goroutine of its own while the caller decodes what it hands
// over. Its manifest and section table are checked when it opens; the
// CRC-32C of the file and the state digest can only be known once every
// byte is read, and Close reports them: a caller builds its state aside and
// keeps it only if Close returns nil.
type Stream struct {
	Manifest Manifest
	Info     Info

	file    string
	entries []entry
	next    int       // sections begun
	mem     []Section // format 1: the sections, read whole and checked

	pieces chan piece
	free   chan []byte
	done   chan error // the reading goroutine's verdict, once it ends
	held   []byte     // the piece last handed out, freed at the next call
	ended  bool       // the current section's pieces are all handed out
	closed bool
	err    error // Close's verdict
}

// piece is what the reading goroutine hands over: bytes of the current
// section, its end (end set), or what stopped it (err set).
type piece struct {
	b   []byte
	end bool
	err error
}

const streamPiece = 1 << 20

// Stream opens version v for reading its state in order (see Stream). An
// error wraps ErrNotFound when the version does not exist and ErrCorrupt
// when what could be checked before reading the state fails. Format 1 files
// are read and checked whole, as Open does.
func (s *Store) Stream(v uint64) (*Stream, error) {
	name := FileName(v)
	path := filepath.Join(s.cfg.Dir, name)
	f, err := s.cfg.FS.Open(path)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, fmt.Errorf("%w: version %d (%s)", ErrNotFound, v, name)
	}
	if err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	st, err := s.stream(name, f)
	if err != nil {
		f.Close()
		s.forget(v)
		return nil, err
	}
	if st.Manifest.Version != v {
		st.Close()
		return nil, corrupt(name, 0, nil, "file of version %d holds version %d", v, st.Manifest.Version)
	}
	_, pins, err := s.scan()
	if err != nil {
		st.Close()
		return nil, err
	}
	st.Info = info(&st.Manifest, name, st.Info.Bytes, pins[v])
	return st, nil
}

func (s *Store) stream(name string, f OpenFile) (*Stream, error) {
	size, err := f.Seek(0, io.SeekEnd)
	if err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	var head [12]byte
	if _, err := f.ReadAt(head[:], 0); err != nil || !bytes.Equal(head[:8], []byte(magic)) {
		if err == nil || size >= 8 && !errors.Is(err, io.EOF) {
			return nil, corrupt(name, 0, nil, "not a tidemark checkpoint (bad magic)")
		}
		return nil, corrupt(name, int(size), ErrTruncated, "file of %d bytes is shorter than a header", size)
	}
	if binary.LittleEndian.Uint32(head[8:]) != 2 {
		// Format 1 keeps its table up front and its file is read whole.
		b := make([]byte, size)
		_, err := f.ReadAt(b, 0)
		f.Close()
		if err != nil {
			return nil, fmt.Errorf("checkpoint: %w", err)
		}
		c, err := s.open(name, b, nil)
		if err != nil {
			return nil, err
		}
		if err := c.Verify(); err != nil {
			return nil, err
		}
		return &Stream{Manifest: c.Manifest, Info: Info{Bytes: int64(len(b))}, file: name, mem: c.Sections}, nil
	}
	// Format 2: the table and manifest are at the end, before the footer.
	if size < start2+footerLen {
		return nil, corrupt(name, int(size), ErrTruncated, "file of %d bytes is shorter than a header and footer", size)
	}
	foot := make([]byte, footerLen)
	if _, err := f.ReadAt(foot, size-footerLen); err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	if n := binary.LittleEndian.Uint64(foot[8:]); n != uint64(size) {
		return nil, corrupt(name, int(size), ErrTruncated, "file is %d bytes but declares %d", size, n)
	}
	l, err := layout2(name, foot, int(size))
	if err != nil {
		return nil, err
	}
	tail := make([]byte, l.footAt-l.tableOff)
	if _, err := f.ReadAt(tail, int64(l.tableOff)); err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	p, err := parseTail2(name, tail, l, s.cfg.MaxRawBytes)
	if err != nil {
		return nil, err
	}
	want, _ := hex.DecodeString(p.manifest.StateSHA256) // checked by parseTail2
	st := &Stream{Manifest: p.manifest, file: name, Info: Info{Bytes: size}}
	entries := p.entries
	zr, err := zstd.NewReader(nil, zstd.WithDecoderConcurrency(1), zstd.WithDecoderMaxMemory(uint64(s.cfg.MaxRawBytes)))
	if err != nil {
		return nil, fmt.Errorf("checkpoint: %w", err)
	}
	st.entries = entries
	st.pieces, st.free, st.done = make(chan piece, 3), make(chan []byte, 4), make(chan error, 1)
	for i := 0; i < cap(st.free); i++ {
		st.free <- make([]byte, streamPiece)
	}
	crc := crc32.New(castagnoli)
	body := bufio.NewReaderSize(io.TeeReader(io.NewSectionReader(f, 0, size-trailerLen), crc), 1<<20)
	go func() {
		st.done <- st.read(body, zr, crc, sha256.New(), want, binary.LittleEndian.Uint32(foot[footerLen-trailerLen:]))
		zr.Close()
		f.Close()
	}()
	return st, nil
}

// read is the reading goroutine: it reads the file in order under the
// CRC-32C, decompresses each section into pieces, hashes them (the state
// digest) and hands them over, then reads the rest of the file and returns
// the verdict.
func (st *Stream) read(body *bufio.Reader, zr *zstd.Decoder, crc hash.Hash32, digest hash.Hash, want []byte, wantCRC uint32) error {
	send := func(p piece) bool {
		st.pieces <- p
		return true
	}
	fail := func(err error) error {
		send(piece{err: err})
		return err
	}
	if _, err := body.Discard(12); err != nil {
		return fail(fmt.Errorf("checkpoint: %w", err))
	}
	for i, e := range st.entries {
		frame := io.LimitReader(body, int64(e.stored))
		if err := zr.Reset(frame); err != nil {
			return fail(corrupt(st.file, e.offset, nil, "section %d does not decompress: %v", i, err))
		}
		for left := e.raw; left > 0; {
			buf := <-st.free
			k, err := io.ReadFull(zr, buf[:min(uint64(len(buf)), left)])
			if err != nil {
				if errors.Is(err, io.ErrUnexpectedEOF) || errors.Is(err, io.EOF) {
					return fail(corrupt(st.file, e.offset, nil, "section %d decompresses to %d bytes, table says %d", i, e.raw-left+uint64(k), e.raw))
				}
				return fail(corrupt(st.file, e.offset, nil, "section %d does not decompress: %v", i, err))
			}
			digest.Write(buf[:k])
			left -= uint64(k)
			if !send(piece{b: buf[:k]}) {
				return nil
			}
		}
		var one [1]byte
		if k, err := zr.Read(one[:]); k > 0 || err != io.EOF {
			return fail(corrupt(st.file, e.offset, nil, "section %d decompresses to more than the %d bytes the table says", i, e.raw))
		}
		if _, err := io.Copy(io.Discard, frame); err != nil {
			return fail(fmt.Errorf("checkpoint: %w", err))
		}
		if !send(piece{end: true}) {
			return nil
		}
	}
	if _, err := io.Copy(io.Discard, body); err != nil {
		return fail(fmt.Errorf("checkpoint: %w", err))
	}
	if got := crc.Sum32(); got != wantCRC {
		return corrupt(st.file, int(st.Info.Bytes)-trailerLen, ErrChecksum, "CRC-32C %08x, file says %08x", got, wantCRC)
	}
	if !bytes.Equal(digest.Sum(nil), want) {
		return corrupt(st.file, 24, ErrChecksum, "state digest does not match state_sha256")
	}
	return nil
}

// NextSection begins the next section and returns its kind, partition and
// raw length; ok is false after the last.
func (st *Stream) NextSection() (global bool, partition int32, size int64, ok bool, err error) {
	if st.mem != nil {
		if st.next >= len(st.mem) {
			return false, 0, 0, false, nil
		}
		s := st.mem[st.next]
		st.next++
		st.ended = false
		return s.Global, s.Partition, int64(len(s.Bytes)), true, nil
	}
	if st.next > 0 && !st.ended {
		return false, 0, 0, false, fmt.Errorf("checkpoint: section %d begun before the one before it was read", st.next)
	}
	if st.next >= len(st.entries) {
		return false, 0, 0, false, nil
	}
	e := st.entries[st.next]
	st.next++
	st.ended = false
	return e.global, e.partition, int64(e.raw), true, nil
}

// Piece returns the next bytes of the section begun, valid until the next
// call; io.EOF after its last.
func (st *Stream) Piece() ([]byte, error) {
	if st.mem != nil {
		if st.ended {
			return nil, io.EOF
		}
		st.ended = true
		return st.mem[st.next-1].Bytes, nil
	}
	if st.held != nil {
		st.free <- st.held[:cap(st.held)]
		st.held = nil
	}
	if st.ended || st.next == 0 {
		return nil, io.EOF
	}
	p, ok := <-st.pieces
	switch {
	case !ok:
		return nil, fmt.Errorf("checkpoint: %s: the file ended early", st.file)
	case p.err != nil:
		return nil, p.err
	case p.end:
		st.ended = true
		return nil, io.EOF
	}
	st.held = p.b
	return p.b, nil
}

// Close reads what is left of the file and returns the verdict on all of it:
// nil only when every check passed, the CRC-32C and the state digest
// included; an error wrapping ErrCorrupt otherwise. A caller that stopped
// early (its own decoding failed) learns whether the file was at fault.
func (st *Stream) Close() error {
	if st.closed {
		return st.err
	}
	st.closed = true
	if st.mem != nil {
		return nil
	}
	// Read the rest: hand no more pieces out, free each one.
	go func() {
		for p := range st.pieces {
			if p.b != nil {
				st.free <- p.b[:cap(p.b)]
			}
		}
	}()
	st.err = <-st.done
	close(st.pieces)
	return st.err
}
