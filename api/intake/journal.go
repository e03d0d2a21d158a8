package intake

import (
	"bufio"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
)

// The local journal: the durable, append-only log that POST /v1/events writes
// and the engine reads, so that an acknowledged event survives a crash.
//
// It is a directory of segment files seg-<first offset, 20 digits>.wal. A
// segment is a sequence of records:
//
//	u32 payload length, u32 CRC-32C of (offset ∥ payload), u64 offset, payload
//
// Offsets start at 1 and increase by one per record across segments. Append
// writes a batch of records and returns only once they are on stable storage
// (fsync); concurrent appends share one fsync (group commit). Readers see
// only records that are durable, so the engine never applies an event that a
// crash could take back. On open, a torn final record (a crash mid-write) is
// cut off the last segment and reported; a damaged record anywhere else is an
// error that names the segment and byte offset.
//
// A Journal is safe for concurrent use.

// Journal limits.
const (
	DefaultSegmentBytes = 64 << 20
	MaxRecordBytes      = MaxLineBytes
	recordHeader        = 16
)

// ErrJournalCorrupt marks damage in the journal other than a torn tail.
var ErrJournalCorrupt = errors.New("intake: journal corrupt")

var crcTable = crc32.MakeTable(crc32.Castagnoli)

// Journal is the local append-only event log.
type Journal struct {
	dir          string
	segmentBytes int64

	wrap     func(*os.File) File
	mu       sync.Mutex
	cond     *sync.Cond
	f        File
	segStart int64 // first offset of the open segment
	size     int64 // bytes in the open segment
	next     int64 // offset the next record gets
	durable  int64 // every record up to here is synced
	syncing  bool
	failed   error         // sticky: a write could not be undone
	notify   chan struct{} // closed and replaced whenever durable advances
	closed   bool
	buf      []byte
}

// JournalConfig configures OpenJournal.
type JournalConfig struct {
	Dir          string // created 0700 if missing. Required.
	SegmentBytes int64  // roll to a new segment past this size. Default: DefaultSegmentBytes.
	// Log receives a line when a torn tail is truncated on open. Nil discards it.
	Log io.Writer
	// File, when set, wraps each segment file opened for writing: the
	// file-system seam through which tests inject failures (a full disk).
	File func(*os.File) File
}

// File is what the journal writes a segment through.
type File interface {
	io.Writer
	Sync() error
	Truncate(size int64) error
	Seek(offset int64, whence int) (int64, error)
	Close() error
}

type segment struct {
	start int64
	path  string
}

func segName(start int64) string { return fmt.Sprintf("seg-%020d.wal", start) }

func (j *Journal) segments() ([]segment, error) {
	ents, err := os.ReadDir(j.dir)
	if err != nil {
		return nil, fmt.Errorf("intake: journal: %w", err)
	}
	var out []segment
	for _, e := range ents {
		n := e.Name()
		digits, ok := strings.CutPrefix(n, "seg-")
		if !ok {
			continue
		}
		digits, ok = strings.CutSuffix(digits, ".wal")
		if !ok || len(digits) != 20 {
			continue
		}
		start, err := strconv.ParseInt(digits, 10, 64)
		if err != nil {
			continue
		}
		out = append(out, segment{start, filepath.Join(j.dir, n)})
	}
	slices.SortFunc(out, func(a, b segment) int { return int(a.start - b.start) })
	return out, nil
}

// OpenJournal opens or creates the journal in cfg.Dir, truncating a torn
// final record.
func OpenJournal(cfg JournalConfig) (*Journal, error) {
	if cfg.Dir == "" {
		return nil, errors.New("intake: journal: no directory given")
	}
	if cfg.SegmentBytes <= 0 {
		cfg.SegmentBytes = DefaultSegmentBytes
	}
	if err := os.MkdirAll(cfg.Dir, 0o700); err != nil {
		return nil, fmt.Errorf("intake: journal: %w", err)
	}
	j := &Journal{dir: cfg.Dir, segmentBytes: cfg.SegmentBytes, next: 1, notify: make(chan struct{}), wrap: cfg.File}
	j.cond = sync.NewCond(&j.mu)
	segs, err := j.segments()
	if err != nil {
		return nil, err
	}
	if len(segs) == 0 {
		if err := j.createSegment(1); err != nil {
			return nil, err
		}
		return j, nil
	}
	last := segs[len(segs)-1]
	good, lastOff, err := scanSegment(last.path, last.start)
	if err != nil && !errors.Is(err, errTorn) {
		return nil, err
	}
	f, err := os.OpenFile(last.path, os.O_RDWR, 0o600)
	if err != nil {
		return nil, fmt.Errorf("intake: journal: %w", err)
	}
	st, _ := f.Stat()
	if st.Size() > good {
		if err := f.Truncate(good); err != nil {
			f.Close()
			return nil, fmt.Errorf("intake: journal: truncate torn tail of %s: %w", last.path, err)
		}
		if err := f.Sync(); err != nil {
			f.Close()
			return nil, fmt.Errorf("intake: journal: %w", err)
		}
		if cfg.Log != nil {
			fmt.Fprintf(cfg.Log, "journal: %s ended in a torn record; truncated from %d to %d bytes (the last good record is offset %d)\n",
				filepath.Base(last.path), st.Size(), good, lastOff)
		}
	}
	if _, err := f.Seek(good, io.SeekStart); err != nil {
		f.Close()
		return nil, fmt.Errorf("intake: journal: %w", err)
	}
	j.f, j.segStart, j.size = j.wrapFile(f), last.start, good
	if lastOff > 0 {
		j.next = lastOff + 1
	} else {
		j.next = last.start
	}
	j.durable = j.next - 1
	return j, nil
}

var errTorn = errors.New("torn record")

// scanSegment validates a segment and returns the length of its valid prefix
// and the last offset in it. A damaged or short final record is errTorn; a
// damaged record followed by more data is ErrJournalCorrupt.
func scanSegment(path string, start int64) (good int64, last int64, err error) {
	f, err := os.Open(path)
	if err != nil {
		return 0, 0, fmt.Errorf("intake: journal: %w", err)
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return 0, 0, fmt.Errorf("intake: journal: %w", err)
	}
	r := bufio.NewReaderSize(f, 1<<16)
	want := start
	var hdr [recordHeader]byte
	var payload []byte
	for {
		if _, err := io.ReadFull(r, hdr[:]); err != nil {
			if err == io.EOF {
				return good, last, nil
			}
			return good, last, errTorn
		}
		n := binary.LittleEndian.Uint32(hdr[0:])
		sum := binary.LittleEndian.Uint32(hdr[4:])
		off := int64(binary.LittleEndian.Uint64(hdr[8:]))
		end := good + recordHeader + int64(n)
		if n > MaxRecordBytes || end > st.Size() {
			if end >= st.Size() || n > MaxRecordBytes && good+recordHeader >= st.Size() {
				return good, last, errTorn
			}
			return good, last, fmt.Errorf("%w: %s: record at byte %d declares %d bytes", ErrJournalCorrupt, filepath.Base(path), good, n)
		}
		payload = slices.Grow(payload[:0], int(n))[:n]
		if _, err := io.ReadFull(r, payload); err != nil {
			return good, last, errTorn
		}
		if recordCRC(off, payload) != sum || off != want {
			if end == st.Size() {
				return good, last, errTorn
			}
			return good, last, fmt.Errorf("%w: %s: record at byte %d fails its checksum (offset %d, want %d)", ErrJournalCorrupt, filepath.Base(path), good, off, want)
		}
		good, last, want = end, off, off+1
	}
}

func recordCRC(off int64, payload []byte) uint32 {
	var b [8]byte
	binary.LittleEndian.PutUint64(b[:], uint64(off))
	return crc32.Update(crc32.Checksum(b[:], crcTable), crcTable, payload)
}

func (j *Journal) createSegment(start int64) error {
	path := filepath.Join(j.dir, segName(start))
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE|os.O_EXCL, 0o600)
	if err != nil {
		return fmt.Errorf("intake: journal: %w", err)
	}
	if err := syncDir(j.dir); err != nil {
		f.Close()
		return fmt.Errorf("intake: journal: %w", err)
	}
	j.f, j.segStart, j.size = j.wrapFile(f), start, 0
	return nil
}

func (j *Journal) wrapFile(f *os.File) File {
	if j.wrap != nil {
		return j.wrap(f)
	}
	return f
}

func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return err
	}
	defer d.Close()
	return d.Sync()
}

// ErrJournalClosed is returned by Append and readers after Close.
var ErrJournalClosed = errors.New("intake: journal closed")

// Append writes payloads as consecutive records and returns once they are
// durable, with the offsets of the first and last. On error nothing of the
// batch is durable or visible to readers, and the journal stays usable when
// the failed write could be undone (a full disk, say).
func (j *Journal) Append(payloads [][]byte) (first, last int64, err error) {
	if len(payloads) == 0 {
		return 0, 0, errors.New("intake: journal: empty append")
	}
	j.mu.Lock()
	defer j.mu.Unlock()
	for j.syncing { // a rollover must not race a sync of the old file
		j.cond.Wait()
	}
	if err := j.usable(); err != nil {
		return 0, 0, err
	}
	if j.size >= j.segmentBytes {
		if err := j.f.Sync(); err != nil {
			return 0, 0, j.fail(fmt.Errorf("intake: journal: %w", err))
		}
		j.f.Close()
		if err := j.createSegment(j.next); err != nil {
			return 0, 0, j.fail(err)
		}
	}
	first = j.next
	j.buf = j.buf[:0]
	for i, p := range payloads {
		if len(p) > MaxRecordBytes {
			return 0, 0, fmt.Errorf("intake: journal: record of %d bytes, more than %d", len(p), MaxRecordBytes)
		}
		off := first + int64(i)
		j.buf = binary.LittleEndian.AppendUint32(j.buf, uint32(len(p)))
		j.buf = binary.LittleEndian.AppendUint32(j.buf, recordCRC(off, p))
		j.buf = binary.LittleEndian.AppendUint64(j.buf, uint64(off))
		j.buf = append(j.buf, p...)
	}
	if _, werr := j.f.Write(j.buf); werr != nil {
		if terr := j.f.Truncate(j.size); terr != nil {
			return 0, 0, j.fail(fmt.Errorf("intake: journal: write failed (%v) and could not be undone: %w", werr, terr))
		}
		if _, serr := j.f.Seek(j.size, io.SeekStart); serr != nil {
			return 0, 0, j.fail(fmt.Errorf("intake: journal: %w", serr))
		}
		return 0, 0, fmt.Errorf("intake: journal: write: %w", werr)
	}
	j.size += int64(len(j.buf))
	j.next += int64(len(payloads))
	last = j.next - 1
	for j.durable < last {
		if err := j.usable(); err != nil {
			return 0, 0, err
		}
		if j.syncing {
			j.cond.Wait()
			continue
		}
		j.syncing = true
		target, f := j.next-1, j.f
		j.mu.Unlock()
		serr := f.Sync()
		j.mu.Lock()
		j.syncing = false
		j.cond.Broadcast()
		if serr != nil {
			return 0, 0, j.fail(fmt.Errorf("intake: journal: fsync: %w", serr))
		}
		if target > j.durable {
			j.durable = target
			close(j.notify)
			j.notify = make(chan struct{})
		}
	}
	return first, last, nil
}

func (j *Journal) usable() error {
	if j.closed {
		return ErrJournalClosed
	}
	return j.failed
}

// fail makes err sticky: after a write that could not be undone or a failed
// fsync the file's state is unknown, so no later append may succeed.
func (j *Journal) fail(err error) error {
	j.failed = err
	j.cond.Broadcast()
	return err
}

// Durable returns the last durable offset (0 when empty).
func (j *Journal) Durable() int64 {
	j.mu.Lock()
	defer j.mu.Unlock()
	return j.durable
}

// wait returns a channel closed once the durable offset passes off.
func (j *Journal) wait(off int64) (ready bool, ch <-chan struct{}, closed bool) {
	j.mu.Lock()
	defer j.mu.Unlock()
	return j.durable >= off, j.notify, j.closed
}

// DeleteBefore removes every segment whose records all precede off (never
// the open segment). It is called once a retained checkpoint covers them.
func (j *Journal) DeleteBefore(off int64) error {
	j.mu.Lock()
	defer j.mu.Unlock()
	segs, err := j.segments()
	if err != nil {
		return err
	}
	removed := false
	for i := 0; i+1 < len(segs); i++ {
		if segs[i+1].start <= off && segs[i].start != j.segStart {
			if err := os.Remove(segs[i].path); err != nil {
				return fmt.Errorf("intake: journal: %w", err)
			}
			removed = true
		}
	}
	if removed {
		return syncDir(j.dir)
	}
	return nil
}

// Close closes the journal; blocked readers return ErrJournalClosed.
func (j *Journal) Close() error {
	j.mu.Lock()
	defer j.mu.Unlock()
	if j.closed {
		return nil
	}
	j.closed = true
	close(j.notify)
	j.notify = make(chan struct{})
	j.cond.Broadcast()
	return j.f.Close()
}

// JournalReader reads durable records in order from an offset on.
// Not safe for concurrent use.
type JournalReader struct {
	j    *Journal
	next int64
	f    *os.File
	r    *bufio.Reader
	seg  int64 // start of the open segment, or −1
	pos  int64 // byte offset in the open segment after the last record returned
	buf  []byte
}

// Reader returns a reader that starts at offset from (1 for the beginning).
func (j *Journal) Reader(from int64) *JournalReader {
	return &JournalReader{j: j, next: max(from, 1), seg: -1}
}

// Next returns the next durable record's offset and payload, blocking until
// one is durable or ctx is done. The payload is valid until the next call.
func (r *JournalReader) Next(ctx context.Context) (int64, []byte, error) {
	for {
		ready, ch, closed := r.j.wait(r.next)
		if closed {
			return 0, nil, ErrJournalClosed
		}
		if !ready {
			select {
			case <-ch:
				continue
			case <-ctx.Done():
				return 0, nil, ctx.Err()
			}
		}
		off, p, err := r.read()
		if err != nil {
			return 0, nil, err
		}
		if off < r.next {
			continue // before the start offset: skip
		}
		r.next = off + 1
		return off, p, nil
	}
}

// read returns the next record in the files, opening segments as needed.
// Read-ahead may have buffered bytes of a write that failed and was undone,
// so a bad record is read once more from the file before it counts as damage.
func (r *JournalReader) read() (int64, []byte, error) {
	off, p, err := r.readOnce()
	if err == nil || r.f == nil {
		return off, p, err
	}
	seg, pos := r.seg, r.pos
	r.f.Close()
	r.f = nil
	if err := r.openAt(seg, pos); err != nil {
		return 0, nil, err
	}
	return r.readOnce()
}

func (r *JournalReader) readOnce() (int64, []byte, error) {
	for {
		if r.f == nil {
			if err := r.open(); err != nil {
				return 0, nil, err
			}
		}
		var hdr [recordHeader]byte
		if _, err := io.ReadFull(r.r, hdr[:]); err != nil {
			if err == io.EOF {
				// End of this segment: the durable record is in the next one.
				r.f.Close()
				r.f, r.seg = nil, -1
				continue
			}
			return 0, nil, fmt.Errorf("%w: reading offset %d: %v", ErrJournalCorrupt, r.next, err)
		}
		n := binary.LittleEndian.Uint32(hdr[0:])
		off := int64(binary.LittleEndian.Uint64(hdr[8:]))
		if n > MaxRecordBytes {
			return 0, nil, fmt.Errorf("%w: record before offset %d declares %d bytes", ErrJournalCorrupt, r.next, n)
		}
		r.buf = slices.Grow(r.buf[:0], int(n))[:n]
		if _, err := io.ReadFull(r.r, r.buf); err != nil {
			return 0, nil, fmt.Errorf("%w: offset %d: %v", ErrJournalCorrupt, off, err)
		}
		if recordCRC(off, r.buf) != binary.LittleEndian.Uint32(hdr[4:]) {
			return 0, nil, fmt.Errorf("%w: offset %d fails its checksum", ErrJournalCorrupt, off)
		}
		r.pos += recordHeader + int64(n)
		return off, r.buf, nil
	}
}

func (r *JournalReader) openAt(seg, pos int64) error {
	f, err := os.Open(filepath.Join(r.j.dir, segName(seg)))
	if err != nil {
		return fmt.Errorf("intake: journal: %w", err)
	}
	if _, err := f.Seek(pos, io.SeekStart); err != nil {
		f.Close()
		return fmt.Errorf("intake: journal: %w", err)
	}
	r.f, r.r, r.seg, r.pos = f, bufio.NewReaderSize(f, 1<<16), seg, pos
	return nil
}

// open opens the segment that holds r.next.
func (r *JournalReader) open() error {
	segs, err := r.j.segments()
	if err != nil {
		return err
	}
	i := len(segs) - 1
	for i >= 0 && segs[i].start > r.next {
		i--
	}
	if i < 0 {
		return fmt.Errorf("%w: offset %d is older than the oldest segment (deleted after a checkpoint covered it)", ErrJournalCorrupt, r.next)
	}
	return r.openAt(segs[i].start, 0)
}

// Close releases the reader's file.
func (r *JournalReader) Close() error {
	if r.f != nil {
		return r.f.Close()
	}
	return nil
}
