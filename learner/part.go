package learner

import (
	"fmt"
	"hash/maphash"
	"maps"
	"slices"
)

// part is what the engine keeps of one stream partition besides its keys:
// its high-water mark and its counters, so that the state of a partition is
// whole in itself and can move between engines (Split, Merge) with every
// figure of a report still exact.
type part struct {
	hwm int64
	counts
	times         timeRange   // event times of the events applied
	learnerAlarms []int64     // per learner
	last          []*Alarm    // per learner, its latest alarm here (nil: none)
	served        *servedBook // its served answers (served.go); nil before any
}

// timeRange is the earliest and latest event time (Unix ns) of the events
// applied; set reports whether any had a time.
type timeRange struct {
	first, last int64
	set         bool
}

func (t *timeRange) add(ns int64) {
	if !t.set {
		t.first, t.last, t.set = ns, ns, true
		return
	}
	t.first, t.last = min(t.first, ns), max(t.last, ns)
}

func (t *timeRange) join(o timeRange) {
	if o.set {
		t.add(o.first)
		t.add(o.last)
	}
}

// counts are an engine's or a partition's event counters.
type counts struct {
	applied, rejected, duplicates, ignored, alarms, skipped int64
}

func (c *counts) add(o counts, sign int64) {
	c.applied += sign * o.applied
	c.rejected += sign * o.rejected
	c.duplicates += sign * o.duplicates
	c.ignored += sign * o.ignored
	c.alarms += sign * o.alarms
	c.skipped += sign * o.skipped
}

func newPart(learners int) *part {
	return &part{learnerAlarms: make([]int64, learners), last: make([]*Alarm, learners)}
}

func (p *part) clone() *part {
	c := *p
	c.served = p.served.clone()
	c.learnerAlarms = append([]int64(nil), p.learnerAlarms...)
	c.last = make([]*Alarm, len(p.last))
	for i, a := range p.last {
		if a != nil {
			b := *a
			c.last[i] = &b
		}
	}
	return &c
}

func cloneParts(ps map[int32]*part) map[int32]*part {
	out := maps.Clone(ps)
	for n, p := range out {
		out[n] = p.clone()
	}
	return out
}

// Split moves the state of the stream partitions ps — their keys, high-water
// marks, counters and alarms — out of e into a new engine of e's
// configuration and schema, which it returns; partitions e has not seen are
// left out. Each engine then reports the figures of its own partitions, and
// Merge puts them back together exactly: the running totals are exact sums,
// so the merged report and state bytes are those of one engine that applied
// every event (issue 14: instances of one consumer group, each owning some
// partitions, add up to one). The keys moved are copied, so that copies of e
// published before (Publish) keep what they hold.
func (e *Engine) Split(ps []int32) *Engine {
	if e.frozen {
		panic("learner: Split on a published engine")
	}
	n, _ := NewEngine(e.cfg) // e's configuration is valid
	n.schema, n.seed = e.schema, e.seed
	move := map[int32]bool{}
	for _, p := range ps {
		if e.parts[p] != nil {
			move[p] = true
		}
	}
	n.moveFrom(e, func(p int32) bool { return move[p] })
	return n
}

// Merge moves every partition of o into e (see Split); o is left empty. o
// must have e's configuration, the same schema (or one of them none) and no
// partition e has; otherwise nothing changes and the error says why.
func (e *Engine) Merge(o *Engine) error {
	if e.frozen || o.frozen {
		panic("learner: Merge with a published engine")
	}
	if e.cfg.Digest() != o.cfg.Digest() {
		return fmt.Errorf("%w: the engines have other learners or settings (%s; %s)", ErrInvalidSpec, e.cfg.Names(), o.cfg.Names())
	}
	if e.schema != nil && o.schema != nil && !sameSchema(e.schema, o.schema) {
		return fmt.Errorf("%w: the engines have other feature schemas", ErrInvalidSpec)
	}
	for p := range o.parts {
		if e.parts[p] != nil {
			return fmt.Errorf("learner: partition %d is in both engines", p)
		}
	}
	if e.schema == nil {
		e.schema = o.schema
	}
	e.moveFrom(o, func(int32) bool { return true })
	return nil
}

// moveFrom moves the partitions of o that take says to e, copying their keys
// into e's working space and, when e publishes, its trie.
func (e *Engine) moveFrom(o *Engine, take func(int32) bool) {
	for p, w := range o.waiting {
		if take(p) {
			delete(o.waiting, p)
			if e.waiting == nil {
				e.waiting = map[int32][]*Answer{}
			}
			e.waiting[p] = w
		}
	}
	for p, pt := range o.parts {
		if !take(p) {
			continue
		}
		delete(o.parts, p)
		e.parts[p] = pt
		o.countPart(pt, -1)
		e.countPart(pt, 1)
	}
	kept := o.byName[:0]
	for _, ks := range o.byName {
		if !take(ks.partition) {
			ks.idx = len(kept)
			kept = append(kept, ks)
			continue
		}
		o.keys.remove(ks)
		if o.publishing {
			o.root = o.root.without(ks.key, ks.hash, 0, o.epoch, o.nodes)
		}
		o.keyBase -= keyBase(ks)
		for i := range o.totals {
			o.totals[i].count(ks, i, -1)
		}
		o.countLead(ks, -1)
		c := allocKey(len(ks.slots))
		c.key, c.partition, c.epoch = ks.key, ks.partition, e.epoch
		c.lead = ks.lead.clone()
		c.hash = maphash.String(e.seed, ks.key)
		for i := range ks.slots {
			s := &ks.slots[i]
			c.slots[i] = slot{learner: s.learner.clone(), score: s.score.clone(), drift: s.drift.clone(), held: s.held}
			c.slots[i].learner.rebind(&e.scratch[i])
			c.slots[i].drift.cfg = e.drift
		}
		e.addKey(c)
	}
	clear(o.byName[len(kept):])
	o.byName, o.sorted = kept, 0
}

// countPart adds (sign 1) or takes out (−1) a partition's counters and
// alarms from the engine's, whose last alarm per learner is then the latest
// over its partitions.
func (e *Engine) countPart(pt *part, sign int64) {
	c := counts{e.applied, e.rejected, e.duplicates, e.ignored, e.alarms, e.skipped}
	c.add(pt.counts, sign)
	e.applied, e.rejected, e.duplicates, e.ignored, e.alarms, e.skipped = c.applied, c.rejected, c.duplicates, c.ignored, c.alarms, c.skipped
	for i := range e.totals {
		t := &e.totals[i]
		t.alarms += sign * pt.learnerAlarms[i]
		t.lastAlarm = nil
		for _, p := range e.parts {
			if a := p.last[i]; a != nil {
				t.lastAlarm = laterAlarm(t.lastAlarm, *a)
			}
		}
	}
}

// EventTimes returns the earliest and latest event time (Unix ns) of the
// events the engine's state has applied, and whether any had a time; with
// partitions given, of those partitions only.
func (e *Engine) EventTimes(partitions ...int32) (first, last int64, ok bool) {
	var t timeRange
	for p, pt := range e.parts {
		if len(partitions) == 0 || slices.Contains(partitions, p) {
			t.join(pt.times)
		}
	}
	return t.first, t.last, t.set
}

// PartitionCounts returns partition p's events applied and rejected, and
// whether the engine holds p.
func (e *Engine) PartitionCounts(p int32) (applied, rejected int64, ok bool) {
	pt := e.parts[p]
	if pt == nil {
		return 0, 0, false
	}
	return pt.applied, pt.rejected, true
}
