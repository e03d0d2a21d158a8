package learner

import (
	"fmt"
	"slices"
)

// The engine's state encoding. Every integer is little-endian of fixed width,
// every float its IEEE-754 bits, strings and lists length-prefixed; keys are
// written sorted by (partition, key) and partitions sorted, so the bytes are
// a deterministic function of the state. Layout:
//
//	magic "TMST", u32 state version
//	learner count, and each learner's canonical spec (checked on decode)
//	schema: numeric names, categorical names, buckets, time flag (or absent)
//	counters: applied, rejected, duplicates, ignored features, alarms
//	partitions: count, then (partition, high-water offset) pairs
//	per learner overall: scorer, alarm count, last alarm (or absent)
//	keys: count, then per key: name, partition, and per learner its model
//	state, scorer and drift detector
const (
	stateMagic   = "TMST"
	stateVersion = 1
	maxNames     = MaxFeatures
)

// Encode appends the engine's state to dst and returns it.
func (e *Engine) Encode(dst []byte) []byte {
	w := &encoder{b: dst}
	w.b = append(w.b, stateMagic...)
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
	w.i64(e.applied)
	w.i64(e.rejected)
	w.i64(e.duplicates)
	w.i64(e.ignored)
	w.i64(e.alarms)
	pos := e.Positions()
	w.int(len(pos))
	for _, p := range pos {
		w.u32(uint32(p.Partition))
		w.i64(p.Offset)
	}
	for i := range e.totals {
		t := &e.totals[i]
		t.score.encode(w)
		w.i64(t.alarms)
		w.bool(t.lastAlarm != nil)
		if t.lastAlarm != nil {
			w.u32(uint32(t.lastAlarm.Position.Partition))
			w.i64(t.lastAlarm.Position.Offset)
			w.str(t.lastAlarm.Key)
			w.i64(t.lastAlarm.Time)
		}
	}
	keys := e.sortedKeys()
	w.int(len(keys))
	for _, ks := range keys {
		w.str(ks.key)
		w.u32(uint32(ks.partition))
		for i, l := range ks.learners {
			l.encode(w)
			ks.scores[i].encode(w)
			ks.drift[i].encode(w)
		}
	}
	return w.b
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

// Decode replaces the state of e, which must have been built with the same
// learner configuration, by the state encoded in b. On error e is unchanged;
// the error wraps ErrCorruptState, or ErrInvalidSpec when the learners in b
// differ from e's.
func (e *Engine) Decode(b []byte) error {
	fresh, err := NewEngine(e.cfg)
	if err != nil {
		return err
	}
	r := &decoder{b: b}
	if string(r.take(len(stateMagic))) != stateMagic {
		return fmt.Errorf("%w: bad magic", ErrCorruptState)
	}
	if v := r.u32(); v != stateVersion {
		return fmt.Errorf("%w: state version %d, this build reads %d", ErrCorruptState, v, stateVersion)
	}
	n := r.count(1<<16, 4)
	if r.err == nil && n != len(e.cfg.Learners) {
		return fmt.Errorf("%w: state has %d learners, configuration has %d", ErrInvalidSpec, n, len(e.cfg.Learners))
	}
	for i := 0; i < n && r.err == nil; i++ {
		if got, want := r.str(1<<12), e.cfg.Learners[i].Canonical(); r.err == nil && got != want {
			return fmt.Errorf("%w: learner %d is %s in the state, %s in the configuration", ErrInvalidSpec, i+1, got, want)
		}
	}
	if r.bool() {
		s := &Schema{Numeric: decodeNames(r), Categorical: decodeNames(r), Buckets: r.int(), Time: r.bool()}
		if r.err == nil && (s.Buckets < 0 || s.Buckets > 1<<16 || (s.Buckets == 0) != (len(s.Categorical) == 0) ||
			!slices.IsSorted(s.Numeric) || !slices.IsSorted(s.Categorical)) {
			r.fail("bad schema")
		}
		if fresh.schema != nil && r.err == nil && !sameSchema(fresh.schema, s) {
			return fmt.Errorf("%w: the state's feature schema differs from the configured one", ErrInvalidSpec)
		}
		fresh.schema = s
	}
	fresh.applied, fresh.rejected, fresh.duplicates, fresh.ignored, fresh.alarms = r.i64(), r.i64(), r.i64(), r.i64(), r.i64()
	np := r.count(1<<20, 12)
	for i := 0; i < np && r.err == nil; i++ {
		fresh.hwm[int32(r.u32())] = r.i64()
	}
	for i := range fresh.totals {
		t := &fresh.totals[i]
		t.score.decode(r)
		t.alarms = r.i64()
		if r.bool() {
			t.lastAlarm = &Alarm{Position: Position{int32(r.u32()), r.i64()}, Key: r.str(MaxKeyBytes), Time: r.i64()}
		}
	}
	nk := r.count(fresh.cfg.MaxKeys, 8)
	if nk > 0 && fresh.schema == nil {
		r.fail("keys without a schema")
	}
	for i := 0; i < nk && r.err == nil; i++ {
		key := r.str(MaxKeyBytes)
		part := int32(r.u32())
		if _, dup := fresh.keys[key]; dup {
			r.fail("key twice")
			break
		}
		ks := fresh.newKey(key, part)
		for j, l := range ks.learners {
			if err := l.decode(r); err != nil {
				break
			}
			ks.scores[j].decode(r)
			ks.drift[j].decode(r)
		}
		fresh.keys[key] = ks
	}
	if r.err == nil && r.off != len(b) {
		r.fail("trailing bytes")
	}
	if r.err != nil {
		return r.err
	}
	*e = *fresh
	return nil
}

func sameSchema(a, b *Schema) bool {
	return slices.Equal(a.Numeric, b.Numeric) && slices.Equal(a.Categorical, b.Categorical) && a.Buckets == b.Buckets && a.Time == b.Time
}
