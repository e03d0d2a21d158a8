package learner

import (
	"crypto/sha256"
	"errors"
	"fmt"
	"hash/maphash"
	"io"
	"slices"
)

// The engine's state encoding. Every integer is little-endian of fixed width,
// every float its IEEE-754 bits, strings and lists length-prefixed; keys are
// written sorted and partitions in ascending order, so the bytes are a
// deterministic function of the state.
//
// The state is cut into sections so that one stream partition's learners can
// be read without decoding the others:
//
//	global section: magic "TMSG", u32 state version; learner count and each
//	  learner's canonical spec (checked on decode); schema (or absent)
//	  (before version 6 then the counters applied, rejected, duplicates,
//	  ignored features, alarms, skipped, and per learner its alarm count and
//	  last alarm (or absent), over all partitions)
//	partition section, one per partition seen, ascending: magic "TMSP",
//	  partition, high-water offset; its counters (applied, rejected,
//	  duplicates, ignored features, alarms, skipped) and per learner its
//	  alarm count and last alarm (or absent); key count, then per key
//	  (sorted): name, and per learner its model state, scorer and drift
//	  detector
//
// The state digest is the SHA-256 of the sections' bytes concatenated in
// that order (global first). Encode wraps the sections in a container
// (u32 count, then per section a partition flag, partition and length).
const (
	globalMagic    = "TMSG"
	partitionMagic = "TMSP"
	// stateVersion 2 added the skipped counter; 3 dropped the per-learner
	// scorer across keys (overall metrics are pooled from the keys). Versions
	// 1 and 2 are still read.
	// 4 added interval coverage to the per-key scorers. 5 keeps windowed
	// sums compensated (window.Sum, window.Moments) with their rounding
	// bounds, and counts late events per windowed learner; older moments are
	// rebuilt from their windows on decode. 6 keeps the counters and drift
	// alarms per partition too, so that a partition's state can move whole
	// (Split, Merge); before 6 they are given to the lowest partition. 7
	// keeps each partition's range of event times applied (for checkpoints
	// to say what they cover); before 7 it is unknown. 8 adds the
	// conformal intervals and the intervals' widths to the scorers; before
	// 8 they start from nothing. 9 adds the ADWIN detector, when the
	// configuration chooses it. 10 adds each key's leader, when the
	// configuration keeps one. 11 adds each partition's served answers
	// and their scores (served.go). 12 adds rls's carried scale factor
	// (before 12 it is 1: R and z were scaled every event).
	stateVersion = 12
	maxNames     = MaxFeatures
	maxSections  = 1 << 20
)

// Section is one independently decodable part of the engine's state: the
// global part, or one stream partition's keys and high-water mark.
type Section struct {
	Global    bool
	Partition int32 // meaningful when !Global
	Bytes     []byte
}

// SectionSink receives the state section by section (EncodeSections):
// Begin starts a section, Write appends to it. A checkpoint store streams
// what it receives to disk.
type SectionSink interface {
	Begin(global bool, partition int32) error
	Write(p []byte) (int, error)
}

// sinkFlush is how many encoded bytes EncodeSections gathers before it
// hands them to the sink: the state is never in memory twice.
const sinkFlush = 256 << 10

// EncodeSections writes the state into sink key by key: the global section
// first, then one per partition in ascending order, the same bytes as
// Sections. It stops at the sink's first error. The engine may be a
// published copy, encoded on another goroutine while its owner goes on.
func (e *Engine) EncodeSections(sink SectionSink) error {
	return e.EncodePartitions(sink, nil)
}

// EncodePartitions is EncodeSections for the partitions ps only (all when
// ps is nil): the global section and theirs, what one partition's
// checkpoint holds in a consumer group.
func (e *Engine) EncodePartitions(sink SectionSink, ps []int32) error {
	w := &encoder{}
	e.encodeGlobal(w)
	if err := sink.Begin(true, 0); err != nil {
		return err
	}
	if _, err := sink.Write(w.b); err != nil {
		return err
	}
	// Keys by partition, each partition's in key order: one pass over the
	// sorted keys.
	byPart := map[int32][]*keyState{}
	for _, ks := range e.ordered() {
		byPart[ks.partition] = append(byPart[ks.partition], ks)
	}
	for _, p := range e.Positions() {
		if ps != nil && !slices.Contains(ps, p.Partition) {
			continue
		}
		if err := sink.Begin(false, p.Partition); err != nil {
			return err
		}
		keys := byPart[p.Partition]
		w.b = append(w.b[:0], partitionMagic...)
		w.u32(uint32(p.Partition))
		w.i64(p.Offset)
		pt := e.parts[p.Partition]
		pt.encode(w)
		w.bool(pt.times.set)
		if pt.times.set {
			w.i64(pt.times.first)
			w.i64(pt.times.last)
		}
		w.bool(pt.served != nil)
		if pt.served != nil {
			pt.served.encode(w)
		}
		w.int(len(keys))
		for i, ks := range keys {
			w.sink += touchAhead(keys, i)
			w.str(ks.key)
			for n := range ks.slots {
				s := &ks.slots[n]
				s.learner.encode(w)
				s.score.encode(w)
				s.drift.encode(w)
			}
			if e.cfg.Leader.On {
				w.bool(ks.lead != nil)
				if ks.lead != nil {
					ks.lead.encode(w)
				}
			}
			if len(w.b) >= sinkFlush {
				if _, err := sink.Write(w.b); err != nil {
					return err
				}
				w.b = w.b[:0]
			}
		}
		if _, err := sink.Write(w.b); err != nil {
			return err
		}
	}
	return nil
}

// touchAhead reads ahead of an encoder at keys[i], in steps as Prefetch
// does: the state of the key 6 ahead, the learners of the one 4 ahead, their
// arrays 2 ahead (keys in key order lie anywhere in memory).
func touchAhead(keys []*keyState, i int) float64 {
	v := 0.0
	if j := i + 6; j < len(keys) {
		v += float64(len(keys[j].slots))
	}
	if j := i + 4; j < len(keys) {
		for n := range keys[j].slots {
			v += float64(keys[j].slots[n].learner.Trained())
		}
	}
	if j := i + 2; j < len(keys) {
		for n := range keys[j].slots {
			s := &keys[j].slots[n]
			v += s.learner.touch()
			if len(s.score.rec) > 0 {
				v += s.score.rec[0]
			}
		}
	}
	return v
}

func (e *Engine) encodeGlobal(w *encoder) {
	w.b = append(w.b, globalMagic...)
	w.u32(stateVersion)
	w.int(len(e.cfg.Learners))
	for i := range e.cfg.Learners {
		w.str(e.cfg.Learners[i].Canonical())
	}
	w.bool(e.schema != nil)
	if e.schema != nil {
		encodeNames(w, e.schema.Numeric)
		encodeNames(w, e.schema.Categorical)
		w.int(e.schema.Buckets)
		w.bool(e.schema.Time)
	}
	// Counters and alarms are in the partition sections (version 6).
}

// sectionList is a SectionSink that keeps the sections in memory.
type sectionList []Section

func (l *sectionList) Begin(global bool, partition int32) error {
	*l = append(*l, Section{Global: global, Partition: partition})
	return nil
}

func (l *sectionList) Write(p []byte) (int, error) {
	s := &(*l)[len(*l)-1]
	s.Bytes = append(s.Bytes, p...)
	return len(p), nil
}

// Sections encodes the state in memory: the global section first, then one
// per partition in ascending order (see EncodeSections, which streams it).
func (e *Engine) Sections() []Section {
	var l sectionList
	e.EncodeSections(&l)
	return l
}

// Encode appends the whole state, its sections in a container, to dst.
func (e *Engine) Encode(dst []byte) []byte {
	w := &encoder{b: dst}
	secs := e.Sections()
	w.u32(uint32(len(secs)))
	for _, s := range secs {
		w.bool(s.Global)
		w.u32(uint32(s.Partition))
		w.int(len(s.Bytes))
		w.b = append(w.b, s.Bytes...)
	}
	return w.b
}

// Digest returns the state digest: SHA-256 over the sections' bytes in
// order. Two engines with the same configuration that applied the same
// events have the same digest.
func (e *Engine) Digest() [32]byte { return DigestSections(e.Sections()) }

// DigestSections is the state digest of encoded sections.
func DigestSections(secs []Section) [32]byte {
	h := sha256.New()
	for _, s := range secs {
		h.Write(s.Bytes)
	}
	var d [32]byte
	h.Sum(d[:0])
	return d
}

// Decode replaces the state of e by the state Encode wrote into b; see
// DecodeSections.
func (e *Engine) Decode(b []byte) error {
	r := newDecoder(b)
	n := int(r.u32())
	if r.err == nil && (n < 1 || n > maxSections || n > len(b)/13) {
		r.fail("bad section count")
	}
	var secs []Section
	for i := 0; i < n && r.err == nil; i++ {
		s := Section{Global: r.bool(), Partition: int32(r.u32())}
		s.Bytes = r.take(r.count(len(b), 1))
		secs = append(secs, s)
	}
	if r.err == nil && r.left() != 0 {
		r.fail("trailing bytes")
	}
	if r.err != nil {
		return r.err
	}
	return e.DecodeSections(secs)
}

// DecodeSections replaces the state of e, which must have been built with
// the same learner configuration, by the state in secs: the global section
// first, then every partition section. On error e is unchanged; the error
// wraps ErrCorruptState, or ErrInvalidSpec when the learners in the state
// differ from e's.
func (e *Engine) DecodeSections(secs []Section) error {
	return e.DecodeStream(&sectionSlice{secs: secs})
}

// SectionStream hands a state's sections over in order, each in pieces, as a
// checkpoint being read does (checkpoint.Stream), so that a large state is
// decoded without being in memory twice.
type SectionStream interface {
	// NextSection begins the next section and returns its kind, partition
	// and length in bytes; ok is false after the last.
	NextSection() (global bool, partition int32, size int64, ok bool, err error)
	// Piece returns the next bytes of the section begun, valid until the
	// next call; io.EOF after its last.
	Piece() ([]byte, error)
}

// DecodeStream is DecodeSections reading from a stream: on error e is
// unchanged, and an error of the stream is returned as it is.
func (e *Engine) DecodeStream(src SectionStream) error {
	fresh, err := NewEngine(e.cfg)
	if err != nil {
		return err
	}
	global, _, size, ok, err := src.NextSection()
	if err != nil {
		return err
	}
	if !ok || !global {
		return fmt.Errorf("%w: the global section must come first", ErrCorruptState)
	}
	var b []byte
	for {
		p, err := src.Piece()
		if err == io.EOF {
			break
		}
		if err != nil {
			return err
		}
		if int64(len(b)+len(p)) > size {
			return fmt.Errorf("%w: the global section is longer than its %d bytes", ErrCorruptState, size)
		}
		b = append(b, p...)
	}
	if err := fresh.decodeGlobal(b); err != nil {
		return err
	}
	for {
		global, part, size, ok, err := src.NextSection()
		if err != nil {
			return err
		}
		if !ok {
			break
		}
		if global {
			return fmt.Errorf("%w: two global sections", ErrCorruptState)
		}
		r := &decoder{total: size, next: src.Piece, ver: fresh.stateVer}
		if err := fresh.decodePartition(part, r); err != nil {
			return err
		}
		if p, err := src.Piece(); err != io.EOF {
			if err == nil {
				err = fmt.Errorf("%w: partition %d: %d bytes past its length", ErrCorruptState, part, len(p))
			}
			return err
		}
	}
	if err := fresh.settleParts(); err != nil {
		return err
	}
	*e = *fresh
	e.ordered() // a decoded engine (a published copy) is read concurrently: order it now
	return nil
}

// sectionSlice is a SectionStream over sections in memory, each one piece.
type sectionSlice struct {
	secs []Section
	i    int  // sections begun
	read bool // the current one handed over
}

func (s *sectionSlice) NextSection() (bool, int32, int64, bool, error) {
	if s.i >= len(s.secs) {
		return false, 0, 0, false, nil
	}
	sec := s.secs[s.i]
	s.i++
	s.read = false
	return sec.Global, sec.Partition, int64(len(sec.Bytes)), true, nil
}

func (s *sectionSlice) Piece() ([]byte, error) {
	if s.read || s.i == 0 {
		return nil, io.EOF
	}
	s.read = true
	return s.secs[s.i-1].Bytes, nil
}

func (e *Engine) decodeGlobal(b []byte) error {
	r := newDecoder(b)
	if string(r.take(len(globalMagic))) != globalMagic {
		return fmt.Errorf("%w: bad magic in the global section", ErrCorruptState)
	}
	v := r.u32()
	e.stateVer = v
	if v < 1 || v > stateVersion {
		return fmt.Errorf("%w: state version %d, this build reads 1 to %d", ErrCorruptState, v, stateVersion)
	}
	n := r.count(1<<16, 4)
	if r.err == nil && n != len(e.cfg.Learners) {
		return fmt.Errorf("%w: the state has %d learners, the configuration %d", ErrInvalidSpec, n, len(e.cfg.Learners))
	}
	for i := 0; i < n && r.err == nil; i++ {
		if got, want := r.str(1<<12), e.cfg.Learners[i].Canonical(); r.err == nil && got != want {
			return fmt.Errorf("%w: learner %d is %s in the state but %s in the configuration", ErrInvalidSpec, i+1, got, want)
		}
	}
	if r.bool() {
		s := &Schema{Numeric: decodeNames(r), Categorical: decodeNames(r), Buckets: r.int(), Time: r.bool()}
		if r.err == nil && (s.Buckets < 0 || s.Buckets > 1<<16 || (s.Buckets == 0) != (len(s.Categorical) == 0) ||
			!slices.IsSorted(s.Numeric) || !slices.IsSorted(s.Categorical)) {
			r.fail("bad schema")
		}
		if e.schema != nil && r.err == nil && !sameSchema(e.schema, s) {
			return fmt.Errorf("%w: the state's feature schema differs from the configured one", ErrInvalidSpec)
		}
		e.schema = s
	}
	if v >= 6 {
		if r.err == nil && r.left() != 0 {
			r.fail("trailing bytes in the global section")
		}
		return r.err
	}
	e.applied, e.rejected, e.duplicates, e.ignored, e.alarms = r.i64(), r.i64(), r.i64(), r.i64(), r.i64()
	if v >= 2 {
		e.skipped = r.i64()
	}
	for i := range e.totals {
		t := &e.totals[i]
		if v < 3 {
			// versions 1 and 2 kept an arrival-order scorer per learner
			// across keys; its figures are now pooled from the keys.
			old := newScorer(maxRecent, DefaultFading)
			old.decode(r, v)
		}
		t.alarms = r.i64()
		t.lastAlarm = decodeAlarm(r)
	}
	if r.err == nil && r.left() != 0 {
		r.fail("trailing bytes in the global section")
	}
	return r.err
}

// decodePartition reads the section of partition sp from r.
func (e *Engine) decodePartition(sp int32, r *decoder) error {
	if string(r.take(len(partitionMagic))) != partitionMagic {
		if r.err != nil && !errors.Is(r.err, ErrCorruptState) {
			return r.err // the stream's own
		}
		return fmt.Errorf("%w: bad magic in the section of partition %d", ErrCorruptState, sp)
	}
	part := int32(r.u32())
	if r.err == nil && part != sp {
		return fmt.Errorf("%w: section of partition %d holds partition %d", ErrCorruptState, sp, part)
	}
	if _, dup := e.parts[part]; dup {
		return fmt.Errorf("%w: partition %d appears twice", ErrCorruptState, part)
	}
	pt := newPart(len(e.cfg.Learners))
	e.parts[part] = pt
	pt.hwm = r.i64()
	if r.ver >= 6 {
		pt.decode(r)
	}
	if r.ver >= 7 {
		pt.times.set = r.bool()
		if pt.times.set {
			pt.times.first, pt.times.last = r.i64(), r.i64()
		}
	}
	if r.ver >= 11 && r.bool() {
		pt.served = e.decodeBook(r, part)
	}
	nk := r.count(e.cfg.MaxKeys-e.keys.len(), 8)
	if nk > 0 && e.schema == nil {
		r.fail("keys without a schema")
	}
	if e.keys.len() == 0 && nk > 0 && r.err == nil {
		// Room for the keys at once, not by doubling (nk is bounded by
		// the bytes left: at least 8 a key).
		e.keys = newKeyIndex(nk)
		e.byName = make([]*keyState, 0, nk)
	}
	prev := ""
	for i := 0; i < nk && r.err == nil; i++ {
		key := r.str(MaxKeyBytes)
		h := maphash.String(e.seed, key)
		if e.keys.get(key, h) != nil || (i > 0 && key <= prev) {
			r.fail("keys out of order or repeated")
			break
		}
		prev = key
		ks := e.newKey(key, h, part)
		for j := range ks.slots {
			l := ks.slots[j].learner
			if err := l.decode(r); err != nil {
				break
			}
			ks.slots[j].score.decode(r, e.stateVer)
			ks.slots[j].drift.decode(r)
		}
		if e.cfg.Leader.On && e.stateVer >= 10 && r.bool() {
			ks.lead = &leader{score: newScorer(e.cfg.Score.Recent, e.cfg.Score.Fading)}
			ks.lead.decode(r, e.stateVer, len(ks.slots))
		}
		e.addKey(ks)
	}
	if r.err == nil && r.left() != 0 {
		r.fail("trailing bytes")
	}
	if r.err != nil {
		return fmt.Errorf("partition %d: %w", sp, r.err)
	}
	return nil
}

func encodeNames(w *encoder, names []string) {
	w.int(len(names))
	for _, n := range names {
		w.str(n)
	}
}

func decodeNames(r *decoder) []string {
	n := r.count(maxNames, 4)
	var out []string
	for i := 0; i < n; i++ {
		out = append(out, r.str(MaxNameBytes))
	}
	return out
}

func sameSchema(a, b *Schema) bool {
	return slices.Equal(a.Numeric, b.Numeric) && slices.Equal(a.Categorical, b.Categorical) && a.Buckets == b.Buckets && a.Time == b.Time
}

func (p *part) encode(w *encoder) {
	for _, v := range [...]int64{p.applied, p.rejected, p.duplicates, p.ignored, p.alarms, p.skipped} {
		w.i64(v)
	}
	for i := range p.last {
		w.i64(p.learnerAlarms[i])
		encodeAlarm(w, p.last[i])
	}
}

func (p *part) decode(r *decoder) {
	p.applied, p.rejected, p.duplicates, p.ignored, p.alarms, p.skipped = r.i64(), r.i64(), r.i64(), r.i64(), r.i64(), r.i64()
	for i := range p.last {
		p.learnerAlarms[i] = r.i64()
		p.last[i] = decodeAlarm(r)
	}
}

func encodeAlarm(w *encoder, a *Alarm) {
	w.bool(a != nil)
	if a != nil {
		w.u32(uint32(a.Position.Partition))
		w.i64(a.Position.Offset)
		w.str(a.Key)
		w.i64(a.Time)
	}
}

func decodeAlarm(r *decoder) *Alarm {
	if !r.bool() {
		return nil
	}
	return &Alarm{Position: Position{int32(r.u32()), r.i64()}, Key: r.str(MaxKeyBytes), Time: r.i64()}
}

// settleParts sets a decoded state's counters and alarms to the sums over
// the partitions decoded (state version 6, whose global section has none:
// decoding some partitions gives their figures), or, for an older state that
// kept totals only, gives those to its lowest partition (and each learner's
// last alarm to the partition it was in).
func (e *Engine) settleParts() error {
	var sum counts
	alarms := make([]int64, len(e.totals))
	for _, p := range e.parts {
		sum.add(p.counts, 1)
		for i, n := range p.learnerAlarms {
			alarms[i] += n
		}
	}
	total := counts{e.applied, e.rejected, e.duplicates, e.ignored, e.alarms, e.skipped}
	if e.stateVer >= 6 {
		e.applied, e.rejected, e.duplicates, e.ignored, e.alarms, e.skipped = sum.applied, sum.rejected, sum.duplicates, sum.ignored, sum.alarms, sum.skipped
		for i := range e.totals {
			e.totals[i].alarms = alarms[i]
			e.totals[i].lastAlarm = nil
			for _, p := range e.parts {
				if a := p.last[i]; a != nil {
					e.totals[i].lastAlarm = laterAlarm(e.totals[i].lastAlarm, *a)
				}
			}
		}
		return nil
	}
	ps := e.Positions()
	if len(ps) == 0 {
		return nil
	}
	low := e.parts[ps[0].Partition]
	low.counts = total
	for i := range e.totals {
		low.learnerAlarms[i] = e.totals[i].alarms
		if a := e.totals[i].lastAlarm; a != nil {
			p := e.parts[a.Position.Partition]
			if p == nil {
				p = low
			}
			c := *a
			p.last[i] = &c
		}
	}
	return nil
}
