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
// crash could take back. On open, whatever follows the last valid record of
// the last segment — a torn record from a crash mid-write, or zeros a power
// cut left in a pre-extended page — is cut off and reported with its size.
// Damage with valid records after it (in any segment) is not cut: a reader
// that meets it returns a *DamageError naming the segment, the byte and
// exactly which offsets cannot be read, and a reader started past those
// offsets reads on.
//
// While open for writing, the journal checks before acknowledging a batch
// that its segment file is still the one in its directory: a data directory
// removed or moved under a running service makes Append fail with
// ErrJournalVanished (and every later Append), never acknowledge events
// written into a deleted file. Check runs the same test on demand.
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

// ErrJournalVanished: the open segment file is no longer in the journal's
// directory (the directory was removed or moved).
var ErrJournalVanished = errors.New("intake: journal files vanished")

// DamageError is damage a reader met: the records from offset From up to
// (not including) To cannot be read. It wraps ErrJournalCorrupt. A reader
// started at To or later reads past it.
type DamageError struct {
	Segment string // file name
	Byte    int64  // where the damage starts in it
	From    int64  // first offset lost
	To      int64  // first offset readable after it
}

func (e *DamageError) Error() string {
	return fmt.Sprintf("%v: %s is damaged at byte %d: offsets %d to %d cannot be read", ErrJournalCorrupt, e.Segment, e.Byte, e.From, e.To-1)
}

func (e *DamageError) Unwrap() error { return ErrJournalCorrupt }

var crcTable = crc32.MakeTable(crc32.Castagnoli)

// Journal is the local append-only event log.
type Journal struct {
	dir          string
	segmentBytes int64

	wrap     func(*os.File) File
	mu       sync.Mutex
	cond     *sync.Cond
	f        File
	raw      *os.File // the open segment, for Check
	rawPath  string
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
	b, err := os.ReadFile(last.path)
	if err != nil {
		return nil, fmt.Errorf("intake: journal: %w", err)
	}
	res := scanBytes(b, last.start)
	good, lastOff := res.end, res.last
	for _, d := range res.damage {
		if cfg.Log != nil {
			fmt.Fprintf(cfg.Log, "journal: %s is damaged at byte %d: offsets %d to %d cannot be read; valid records follow\n",
				filepath.Base(last.path), d.byteAt, d.from, d.to-1)
		}
	}
	f, err := os.OpenFile(last.path, os.O_RDWR, 0o600)
	if err != nil {
		return nil, fmt.Errorf("intake: journal: %w", err)
	}
	if size := int64(len(b)); size > good {
		if err := f.Truncate(good); err != nil {
			f.Close()
			return nil, fmt.Errorf("intake: journal: cut the invalid tail of %s: %w", last.path, err)
		}
		if err := f.Sync(); err != nil {
			f.Close()
			return nil, fmt.Errorf("intake: journal: %w", err)
		}
		if cfg.Log != nil {
			fmt.Fprintf(cfg.Log, "journal: %s ended in a torn record or invalid bytes; cut %d bytes (from %d to %d bytes; the last good record is offset %d)\n",
				filepath.Base(last.path), size-good, size, good, lastOff)
		}
	}
	if _, err := f.Seek(good, io.SeekStart); err != nil {
		f.Close()
		return nil, fmt.Errorf("intake: journal: %w", err)
	}
	j.f, j.raw, j.rawPath, j.segStart, j.size = j.wrapFile(f), f, last.path, last.start, good
	if lastOff >= last.start {
		j.next = lastOff + 1
	} else {
		j.next = last.start
	}
	j.durable = j.next - 1
	return j, nil
}

// scanned is what scanBytes finds in a segment.
type scanned struct {
	end    int64 // byte position after the last valid record
	last   int64 // offset of the last valid record (start − 1 when none)
	damage []damageAt
}

// damageAt is a damaged region with valid records after it.
type damageAt struct {
	byteAt   int64 // where it starts
	from, to int64 // offsets lost: from ≤ offset < to
	resume   int64 // byte position of the next valid record
}

// scanBytes walks the records of a segment whose first offset is start. A
// record that fails a check starts a damaged region; the scan resumes at the
// next valid record (one whose length fits, whose offset is past the last
// good one and whose CRC matches). Bytes after the last valid record are the
// tail: end excludes them.
func scanBytes(b []byte, start int64) scanned {
	res := scanned{last: start - 1}
	var pos int64
	want := start
	for pos < int64(len(b)) {
		if n, off, ok := validAt(b, pos, want); ok {
			if off > want { // a valid record, but offsets before it are missing
				res.damage = append(res.damage, damageAt{byteAt: pos, from: want, to: off, resume: pos})
			}
			pos += recordHeader + n
			res.end, res.last, want = pos, off, off+1
			continue
		}
		q, off, ok := resync(b, pos+1, want)
		if !ok {
			break // the tail
		}
		res.damage = append(res.damage, damageAt{byteAt: pos, from: want, to: off, resume: q})
		pos, want = q, off
	}
	return res
}

// validAt reports whether a valid record with an offset of at least minOff
// starts at byte p of b, and returns its payload length and offset.
func validAt(b []byte, p, minOff int64) (n, off int64, ok bool) {
	if int64(len(b))-p < recordHeader {
		return 0, 0, false
	}
	h := b[p : p+recordHeader]
	n = int64(binary.LittleEndian.Uint32(h[0:]))
	off = int64(binary.LittleEndian.Uint64(h[8:]))
	if n > MaxRecordBytes || p+recordHeader+n > int64(len(b)) || off < minOff || off-minOff > 1<<40 {
		return 0, 0, false
	}
	payload := b[p+recordHeader : p+recordHeader+n]
	return n, off, recordCRC(off, payload) == binary.LittleEndian.Uint32(h[4:])
}

// resync finds the first valid record at or after byte p with an offset of
// at least minOff.
func resync(b []byte, p, minOff int64) (at, off int64, ok bool) {
	for ; p+recordHeader <= int64(len(b)); p++ {
		if _, off, ok := validAt(b, p, minOff); ok {
			return p, off, true
		}
	}
	return 0, 0, false
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
	j.f, j.raw, j.rawPath, j.segStart, j.size = j.wrapFile(f), f, path, start, 0
	return nil
}

// linked returns ErrJournalVanished (wrapped) unless the open segment file
// is still the file at its path in the journal's directory. Cost: two stat
// calls. Called with j.mu held.
func (j *Journal) linked() error {
	have, err := j.raw.Stat()
	if err != nil {
		return fmt.Errorf("%w: %v", ErrJournalVanished, err)
	}
	now, err := os.Stat(j.rawPath)
	if err != nil || !os.SameFile(have, now) {
		return fmt.Errorf("%w: %s is no longer in %s (was the data directory removed or moved?)", ErrJournalVanished, filepath.Base(j.rawPath), j.dir)
	}
	return nil
}

// Check reports a failure that stops the journal: a write that could not be
// undone earlier, or files that have vanished (which it then makes sticky).
// The service runs it periodically, so that it notices without traffic.
func (j *Journal) Check() error {
	j.mu.Lock()
	defer j.mu.Unlock()
	if err := j.usable(); err != nil {
		return err
	}
	if err := j.linked(); err != nil {
		return j.fail(err)
	}
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
	if first, last, err = j.writeLocked(payloads); err != nil {
		return 0, 0, err
	}
	if err := j.syncTo(last); err != nil {
		return 0, 0, err
	}
	return first, last, nil
}

// syncTo returns once every record up to last is on stable storage, sharing
// one fsync among concurrent callers (group commit). j.mu is held.
func (j *Journal) syncTo(last int64) error {
	for j.durable < last {
		if err := j.usable(); err != nil {
			return err
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
			return j.fail(fmt.Errorf("intake: journal: fsync: %w", serr))
		}
		// Synced into a file that is no longer in the directory is not
		// durable: neither acknowledge nor show it to readers, now or later.
		if err := j.linked(); err != nil {
			return j.fail(err)
		}
		if target > j.durable {
			j.durable = target
			close(j.notify)
			j.notify = make(chan struct{})
		}
	}
	return nil
}

// Write stores payloads as consecutive records without waiting for them to
// reach stable storage, and returns their offsets; Sync waits for that. A
// writer that must not wait for a disk flush (the service's loop, logging
// the answers it serves) writes, and whoever acknowledges syncs.
func (j *Journal) Write(payloads [][]byte) (first, last int64, err error) {
	if len(payloads) == 0 {
		return 0, 0, errors.New("intake: journal: empty write")
	}
	j.mu.Lock()
	defer j.mu.Unlock()
	if err := j.usable(); err != nil {
		return 0, 0, err
	}
	return j.writeLocked(payloads)
}

// writeLocked writes payloads as records after the last, rolling over to a
// new segment first when the open one is full (after any sync in flight of
// the old file). j.mu is held.
func (j *Journal) writeLocked(payloads [][]byte) (first, last int64, err error) {
	if j.size >= j.segmentBytes {
		for j.syncing { // a rollover must not race a sync of the old file
			j.cond.Wait()
		}
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
	return first, j.next - 1, nil
}

// Sync returns once every record up to offset last is on stable storage.
func (j *Journal) Sync(last int64) error {
	j.mu.Lock()
	defer j.mu.Unlock()
	return j.syncTo(last)
}

// ReadJournal calls each, in order, with every valid record of offset from
// or later in the journal directory dir, reading its files without opening
// the journal: a torn tail ends the reading, damage is passed over (its
// records are not read). It stops at each's first error and returns it.
func ReadJournal(dir string, from int64, each func(off int64, payload []byte) error) error {
	segs, err := (&Journal{dir: dir}).segments()
	if err != nil {
		return err
	}
	for i, sg := range segs {
		if i+1 < len(segs) && segs[i+1].start <= from {
			continue // every record of it precedes from
		}
		b, err := os.ReadFile(sg.path)
		if err != nil {
			return fmt.Errorf("intake: journal: %w", err)
		}
		pos, want := int64(0), sg.start
		for pos < int64(len(b)) {
			n, off, ok := validAt(b, pos, want)
			if !ok {
				q, o, found := resync(b, pos+1, want)
				if !found {
					break
				}
				pos, want = q, o
				continue
			}
			if off >= from {
				if err := each(off, b[pos+recordHeader:pos+recordHeader+n]); err != nil {
					return err
				}
			}
			pos += recordHeader + n
			want = off + 1
		}
	}
	return nil
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
	j       *Journal
	next    int64
	f       *os.File
	r       *bufio.Reader
	seg     int64 // start of the open segment, or −1
	pos     int64 // byte offset in the open segment after the last record returned
	lastOff int64 // offset of the last record read in the open segment (seg − 1 before any)
	buf     []byte
}

// Reader returns a reader that starts at offset from (1 for the beginning).
func (j *Journal) Reader(from int64) *JournalReader {
	return &JournalReader{j: j, next: max(from, 1), seg: -1}
}

// Next returns the next durable record's offset and payload, blocking until
// one is durable or ctx is done. The payload is valid until the next call.
// Damage that costs offsets at or after the reader's position is a
// *DamageError; damage before it is read past.
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
	for {
		off, p, err := r.readOnce()
		if err == nil || !errors.Is(err, errBadRecord) {
			return off, p, err
		}
		seg, pos := r.seg, r.pos
		r.f.Close()
		r.f = nil
		if err := r.openAt(seg, pos); err != nil {
			return 0, nil, err
		}
		off, p, err = r.readOnce()
		if err == nil || !errors.Is(err, errBadRecord) {
			return off, p, err
		}
		if err := r.damaged(); err != nil {
			return 0, nil, err
		}
		// Repositioned past damage that costs nothing wanted: read on.
	}
}

// errBadRecord: the record at the reader's position fails a check.
var errBadRecord = errors.New("bad record")

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
			return 0, nil, errBadRecord
		}
		n := binary.LittleEndian.Uint32(hdr[0:])
		off := int64(binary.LittleEndian.Uint64(hdr[8:]))
		if n > MaxRecordBytes || off <= r.lastOff {
			return 0, nil, errBadRecord
		}
		r.buf = slices.Grow(r.buf[:0], int(n))[:n]
		if _, err := io.ReadFull(r.r, r.buf); err != nil {
			return 0, nil, errBadRecord
		}
		if recordCRC(off, r.buf) != binary.LittleEndian.Uint32(hdr[4:]) {
			return 0, nil, errBadRecord
		}
		if gap := r.lastOff + 1; off > gap && off > r.next {
			// A valid record, but the offsets before it are missing from
			// the segment: report them and stay put (the next read meets
			// the same gap until the reader starts past it).
			d := &DamageError{Segment: segName(r.seg), Byte: r.pos, From: max(gap, r.next), To: off}
			r.f.Close()
			r.f, r.seg = nil, -1
			return 0, nil, d
		}
		r.pos += recordHeader + int64(n)
		r.lastOff = off
		return off, r.buf, nil
	}
}

// damaged handles a bad record at the reader's position: it finds where
// valid records resume (later in the segment, the next segment, or nothing
// yet) and the offsets lost in between. When none of them is wanted (all
// before the reader's next offset) it repositions after the damage and
// returns nil; otherwise it returns a *DamageError and stays put.
func (r *JournalReader) damaged() error {
	seg, pos := r.seg, r.pos
	name := segName(seg)
	b, err := os.ReadFile(filepath.Join(r.j.dir, name))
	if err != nil {
		return fmt.Errorf("intake: journal: %w", err)
	}
	from := r.lastOff + 1
	var to int64
	resumeSeg, resumePos := int64(-1), int64(0)
	if q, off, ok := resync(b, pos+1, from); ok {
		to, resumeSeg, resumePos = off, seg, q
	} else {
		segs, err := r.j.segments()
		if err != nil {
			return err
		}
		for _, sg := range segs {
			if sg.start > seg {
				to, resumeSeg = sg.start, sg.start
				break
			}
		}
		if resumeSeg < 0 {
			// Nothing valid follows yet in the last segment.
			to = r.j.Durable() + 1
		}
	}
	if to <= r.next && resumeSeg >= 0 {
		last := r.lastOff
		r.f.Close()
		r.f = nil
		if err := r.openAt(resumeSeg, resumePos); err != nil {
			return err
		}
		if resumeSeg == seg {
			r.lastOff = last
		}
		return nil
	}
	if to <= r.next {
		return fmt.Errorf("%w: %s is damaged at byte %d and nothing valid follows it", ErrJournalCorrupt, name, pos)
	}
	return &DamageError{Segment: name, Byte: pos, From: max(from, r.next), To: to}
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
	if pos == 0 || seg != r.seg {
		r.lastOff = seg - 1
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
