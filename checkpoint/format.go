package checkpoint

import (
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"hash/crc32"
	"time"
)

// FormatVersion is the file format this build writes; it reads 1 and 2.
//
// Version 2 puts the section table and the manifest after the sections, so
// that a state is written as it is encoded, key by key, without a second
// copy of it in memory:
//
//	magic "TMCKPT\r\n", u32 format version
//	the sections' zstd frames, back to back, each with its content checksum
//	section table: per section kind (0 global, 1 partition), u32 partition,
//	  u64 raw length, u64 stored length
//	manifest (JSON)
//	u32 section count, u32 manifest length, u64 file length
//	u32 CRC-32C of everything before it
//
// Version 1 has the same parts with the manifest and table first (after a
// u64 file length and u32 manifest length in the header) and a SHA-256 per
// section in the table: it needs every section's size and digest before the
// first byte of state is written. In both, the manifest's state_sha256 is
// the SHA-256 of all sections' raw bytes in order, checked on every full load.
const FormatVersion = 2

const footerLen = 4 + 4 + 8 + trailerLen

const (
	magic        = "TMCKPT\r\n"
	headerLen    = 24
	entryLen     = 53 // format 1
	entryLen2    = 21 // format 2: no SHA-256 per section (the frames carry checksums)
	trailerLen   = 4
	maxManifest  = 16 << 20
	maxSections  = 1 << 20
	kindGlobal   = 0
	kindPartiton = 1
)

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

// Reason says why a checkpoint was taken.
type Reason string

// Reasons.
const (
	Periodic Reason = "periodic"
	Manual   Reason = "manual"
	Shutdown Reason = "shutdown"
	PreDrift Reason = "pre-drift"
	Final    Reason = "final"
	// Handover: a partition's state, written by the instance of a consumer
	// group that gives the partition up, for its next owner.
	Handover Reason = "handover"
	// Restore: the state a restore set, written before it became live.
	Restore Reason = "restore"
)

// ParseReason parses a reason name.
func ParseReason(s string) (Reason, error) {
	switch r := Reason(s); r {
	case Periodic, Manual, Shutdown, PreDrift, Final, Handover, Restore:
		return r, nil
	}
	return "", fmt.Errorf("checkpoint: unknown reason %q (want periodic, manual, shutdown, pre-drift, final, handover or restore)", s)
}

// Position is a stream position the state covers: the high-water offset of
// one partition.
type Position struct {
	Partition int32 `json:"partition"`
	Offset    int64 `json:"offset"`
}

// Metric is a learner's headline score at checkpoint time.
type Metric struct {
	Name   string   `json:"name"`
	Scored int64    `json:"scored"`
	MAE    *float64 `json:"mae"`
	RMSE   *float64 `json:"rmse"`
}

// Manifest describes a checkpoint. Version and StateSHA256, RawBytes are set
// by the Store when it writes; the caller fills in the rest.
type Manifest struct {
	Version   uint64     `json:"version"`
	Parent    uint64     `json:"parent"` // the version this state descends from; 0 for none
	Created   time.Time  `json:"created"`
	Reason    Reason     `json:"reason"`
	Positions []Position `json:"positions"`
	Events    int64      `json:"events"` // events the state has applied
	// EventTimes is the range of event times of the events the state has
	// applied (nil when none had a time, or for a state written before it
	// was recorded).
	EventTimes   *TimeRange      `json:"event_times,omitempty"`
	ConfigSHA256 string          `json:"config_sha256"`
	StateSHA256  string          `json:"state_sha256"`
	RawBytes     int64           `json:"raw_bytes"`
	Metrics      []Metric        `json:"metrics,omitempty"`
	Source       json.RawMessage `json:"source,omitempty"` // the intake's own record, e.g. a history prefix digest
	// Generation is the Kafka consumer-group generation in which the writer
	// owned the state's partitions (0 outside a group), and Owner names the
	// writer. A generation's checkpoints take versions of their own band,
	// Generation·2³² + 1, + 2, …, so the newest version is always the newest
	// owner's: an instance that lost a partition cannot make its state the
	// newest again (Store.WriteState refuses, ErrFenced).
	Generation int64  `json:"generation,omitempty"`
	Owner      string `json:"owner,omitempty"`
}

// TimeRange is a range of event times, both ends included.
type TimeRange struct {
	First time.Time `json:"first"`
	Last  time.Time `json:"last"`
}

// generationBand is the first version of generation g's band.
func generationBand(g int64) uint64 { return uint64(g) << 32 }

// Section is one part of the engine's state, as the engine encoded it.
type Section struct {
	Global    bool
	Partition int32
	Bytes     []byte
}

// stateDigest is SHA-256 over the sections' bytes in order.
func stateDigest(secs []Section) string {
	h := sha256.New()
	for _, s := range secs {
		h.Write(s.Bytes)
	}
	return hex.EncodeToString(h.Sum(nil))
}

// entry is a parsed section table entry.
type entry struct {
	global    bool
	partition int32
	raw       uint64
	stored    uint64
	hasSum    bool // format 1 keeps a SHA-256 per section
	sum       [32]byte
	offset    int // of the body in the file
}

// parsed is a verified file before decompression.
type parsed struct {
	manifest Manifest
	entries  []entry
}

// corrupt wraps ErrCorrupt, and a precise sentinel when given, with the file and offset.
func corrupt(file string, off int, precise error, format string, args ...any) error {
	msg := fmt.Sprintf(format, args...)
	if precise != nil {
		return fmt.Errorf("%s: byte %d: %s: %w: %w", file, off, msg, ErrCorrupt, precise)
	}
	return fmt.Errorf("%s: byte %d: %s: %w", file, off, msg, ErrCorrupt)
}

// parseFile checks everything but the section bodies' contents.
func parseFile(file string, b []byte, maxRaw int64) (*parsed, error) {
	if len(b) < headerLen+trailerLen || !bytes.Equal(b[:8], []byte(magic)) {
		if len(b) >= 8 && !bytes.Equal(b[:8], []byte(magic)) {
			return nil, corrupt(file, 0, nil, "not a tidemark checkpoint (bad magic)")
		}
		return nil, corrupt(file, len(b), ErrTruncated, "file of %d bytes is shorter than a header", len(b))
	}
	switch v := binary.LittleEndian.Uint32(b[8:12]); v {
	case 1:
	case 2:
		return parseFile2(file, b, maxRaw)
	default:
		return nil, corrupt(file, 8, ErrUnsupportedVersion, "format version %d, this build reads 1 and 2", v)
	}
	if n := binary.LittleEndian.Uint64(b[12:20]); n != uint64(len(b)) {
		return nil, corrupt(file, len(b), ErrTruncated, "file is %d bytes but declares %d", len(b), n)
	}
	body := b[:len(b)-trailerLen]
	if got, want := crc32.Checksum(body, castagnoli), binary.LittleEndian.Uint32(b[len(b)-trailerLen:]); got != want {
		return nil, corrupt(file, len(b)-trailerLen, ErrChecksum, "CRC-32C %08x, file says %08x", got, want)
	}
	off := 20
	ml := int(binary.LittleEndian.Uint32(b[off:]))
	off += 4
	if ml > maxManifest || ml > len(body)-off-4 {
		return nil, corrupt(file, 20, nil, "manifest length %d does not fit", ml)
	}
	p := &parsed{}
	dec := json.NewDecoder(bytes.NewReader(b[off : off+ml]))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&p.manifest); err != nil {
		return nil, corrupt(file, off, nil, "manifest: %v", err)
	}
	off += ml
	n := int(binary.LittleEndian.Uint32(b[off:]))
	off += 4
	if n < 1 || n > maxSections || n > (len(body)-off)/entryLen {
		return nil, corrupt(file, off-4, nil, "section count %d does not fit", n)
	}
	bodyOff := off + n*entryLen
	var (
		raw uint64
		err error
	)
	p.entries, bodyOff, raw, err = parseTable(file, b, off, 0, n, entryLen, bodyOff, len(body), maxRaw)
	if err != nil {
		return nil, err
	}
	if bodyOff != len(body) {
		return nil, corrupt(file, bodyOff, nil, "%d bytes after the last section", len(body)-bodyOff)
	}
	if int64(raw) != p.manifest.RawBytes {
		return nil, corrupt(file, 24, nil, "manifest says %d raw bytes, sections hold %d", p.manifest.RawBytes, raw)
	}
	if d, err := hex.DecodeString(p.manifest.StateSHA256); err != nil || len(d) != sha256.Size {
		return nil, corrupt(file, 24, nil, "manifest state_sha256 %q is not a SHA-256", p.manifest.StateSHA256)
	}
	return p, nil
}

// parseFile2 is parseFile for format version 2 (see FormatVersion).
func parseFile2(file string, b []byte, maxRaw int64) (*parsed, error) {
	if len(b) < start2+footerLen {
		return nil, corrupt(file, len(b), ErrTruncated, "file of %d bytes is shorter than a header and footer", len(b))
	}
	foot := b[len(b)-footerLen:]
	if n := binary.LittleEndian.Uint64(foot[8:]); n != uint64(len(b)) {
		return nil, corrupt(file, len(b), ErrTruncated, "file is %d bytes but declares %d", len(b), n)
	}
	body := b[:len(b)-trailerLen]
	if got, want := crc32.Checksum(body, castagnoli), binary.LittleEndian.Uint32(b[len(b)-trailerLen:]); got != want {
		return nil, corrupt(file, len(b)-trailerLen, ErrChecksum, "CRC-32C %08x, file says %08x", got, want)
	}
	l, err := layout2(file, foot, len(b))
	if err != nil {
		return nil, err
	}
	return parseTail2(file, b[l.tableOff:l.footAt], l, maxRaw)
}

// start2 is where a format-2 file's first section begins: after the magic
// and the format version.
const start2 = 12

// tail2 is where a format-2 file's section table and manifest lie.
type tail2 struct {
	n                        int // sections
	tableOff, manOff, footAt int
}

// layout2 reads from a format-2 file's footer (its last footerLen bytes; the
// file is size bytes) where its table and manifest lie, and checks that
// they fit. Both readers use it: the whole-file one after the CRC, the
// stream before reading the rest.
func layout2(file string, foot []byte, size int) (tail2, error) {
	l := tail2{n: int(binary.LittleEndian.Uint32(foot[0:])), footAt: size - footerLen}
	ml := int(binary.LittleEndian.Uint32(foot[4:]))
	if ml > maxManifest || ml > l.footAt-start2 {
		return l, corrupt(file, l.footAt+4, nil, "manifest length %d does not fit", ml)
	}
	l.manOff = l.footAt - ml
	if l.n < 1 || l.n > maxSections || l.n > (l.manOff-start2)/entryLen2 {
		return l, corrupt(file, l.footAt, nil, "section count %d does not fit", l.n)
	}
	l.tableOff = l.manOff - l.n*entryLen2
	return l, nil
}

// parseTail2 parses a format-2 file's section table and manifest — tail is
// the file's bytes from the table to the footer, laid out as l — and checks
// them against each other and against maxRaw.
func parseTail2(file string, tail []byte, l tail2, maxRaw int64) (*parsed, error) {
	p := &parsed{}
	dec := json.NewDecoder(bytes.NewReader(tail[l.manOff-l.tableOff:]))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&p.manifest); err != nil {
		return nil, corrupt(file, l.manOff, nil, "manifest: %v", err)
	}
	entries, bodyOff, raw, err := parseTable(file, tail, 0, l.tableOff, l.n, entryLen2, start2, l.tableOff, maxRaw)
	if err != nil {
		return nil, err
	}
	p.entries = entries
	if bodyOff != l.tableOff {
		return nil, corrupt(file, bodyOff, nil, "%d bytes between the last section and the table", l.tableOff-bodyOff)
	}
	if int64(raw) != p.manifest.RawBytes {
		return nil, corrupt(file, l.manOff, nil, "manifest says %d raw bytes, sections hold %d", p.manifest.RawBytes, raw)
	}
	if d, err := hex.DecodeString(p.manifest.StateSHA256); err != nil || len(d) != sha256.Size {
		return nil, corrupt(file, l.manOff, nil, "manifest state_sha256 %q is not a SHA-256", p.manifest.StateSHA256)
	}
	return p, nil
}

// parseTable reads n section entries of size size (format 1: with a SHA-256
// each; format 2: without) from b at off (byte base+off of the file), the sections' bodies starting at
// bodyOff and ending by end. It returns them with each body's offset, where
// the bodies end, and their raw size in all, checked against maxRaw.
func parseTable(file string, b []byte, off, base, n, size, bodyOff, end int, maxRaw int64) ([]entry, int, uint64, error) {
	var raw uint64
	entries := make([]entry, 0, n)
	for i := 0; i < n; i++ {
		e := entry{
			global:    b[off] == kindGlobal,
			partition: int32(binary.LittleEndian.Uint32(b[off+1:])),
			raw:       binary.LittleEndian.Uint64(b[off+5:]),
			stored:    binary.LittleEndian.Uint64(b[off+13:]),
			offset:    bodyOff,
		}
		if b[off] > kindPartiton || (i == 0) != e.global {
			return nil, 0, 0, corrupt(file, base+off, nil, "section %d has kind %d (the global section comes first, once)", i, b[off])
		}
		if size == entryLen {
			copy(e.sum[:], b[off+21:off+53])
			e.hasSum = true
		}
		if e.stored > uint64(end-bodyOff) {
			return nil, 0, 0, corrupt(file, base+off+13, nil, "section %d stored length %d does not fit", i, e.stored)
		}
		raw += e.raw
		if e.raw > uint64(maxRaw) || raw > uint64(maxRaw) {
			return nil, 0, 0, corrupt(file, base+off+5, ErrTooLarge, "state of more than %d bytes (limit %d)", raw, maxRaw)
		}
		bodyOff += int(e.stored)
		entries = append(entries, e)
		off += size
	}
	return entries, bodyOff, raw, nil
}
