package learner

import (
	"math"
	"sync"
	"sync/atomic"
)

// Recycling the versions of keys that published copies no longer show.
//
// Publishing makes the engine copy a key the first time it changes after a
// publish (Engine.own); the version it replaces stays readable by the copies
// published before. Once every such copy is released by its readers, nothing
// can read that version again, and the next copy is made into its storage
// instead of new memory: a publish then costs copying into memory recently
// used rather than allocating, and leaves the collector nothing to mark.
// It is the epoch scheme of Fraser 2004 ("Practical lock-freedom", Cambridge
// technical report 579, §5.2.3): a version replaced in epoch R was visible in
// copies of epochs before R; it is reused once no copy of an epoch before R
// is held.
//
// Readers that hold a published copy say so: Acquire before reading it,
// Release after. The owner releases its own hold when it stops handing the
// copy out. An engine recycles only when asked (RecycleReleased): copies
// that are never released then keep what they show, as without recycling.

// views is the registry of an engine's published copies still held, shared
// by the engine and its copies.
type views struct {
	mu     sync.Mutex
	live   map[uint64]bool // epochs of copies still held
	oldest atomic.Uint64   // the least of them; MaxUint64 when none
}

func newViews() *views {
	v := &views{live: map[uint64]bool{}}
	v.oldest.Store(math.MaxUint64)
	return v
}

func (v *views) add(epoch uint64) {
	v.mu.Lock()
	v.live[epoch] = true
	v.oldest.Store(min(v.oldest.Load(), epoch))
	v.mu.Unlock()
}

func (v *views) remove(epoch uint64) {
	v.mu.Lock()
	delete(v.live, epoch)
	oldest := uint64(math.MaxUint64)
	for e := range v.live {
		oldest = min(oldest, e)
	}
	v.oldest.Store(oldest)
	v.mu.Unlock()
}

// retiredList is the versions of keys replaced in one epoch.
type retiredList struct {
	epoch uint64
	kss   []*keyState
}

// maxSpares bounds the versions kept for reuse; past it they are left to
// the collector.
const maxSpares = 1 << 14

// RecycleReleased makes the engine reuse the storage of key versions that no
// published copy still held shows (see Acquire and Release). The engine's
// publisher must then release every copy it publishes once it no longer
// hands it out, and every reader hold the copy it reads.
func (e *Engine) RecycleReleased() { e.recycling = true }

// Acquire holds a published copy for reading: it returns false when the
// copy was released by all its holders (take the newer one). Release ends
// the hold. Publish returns a copy held once, by its publisher.
func (e *Engine) Acquire() bool {
	if e.holds == nil {
		panic("learner: Acquire of an engine that was not published")
	}
	for {
		n := e.holds.Load()
		if n <= 0 {
			return false
		}
		if e.holds.CompareAndSwap(n, n+1) {
			return true
		}
	}
}

// Release ends a hold of a published copy (Acquire, or the publisher's).
func (e *Engine) Release() {
	if e.holds == nil {
		panic("learner: Release of an engine that was not published")
	}
	if n := e.holds.Add(-1); n == 0 && e.views != nil {
		e.views.remove(e.viewEpoch)
	} else if n < 0 {
		panic("learner: Release of a copy not held")
	}
}

// retire records ks, replaced in the current epoch, for reuse.
func (e *Engine) retire(ks *keyState) {
	if n := len(e.retired); n == 0 || e.retired[n-1].epoch != e.epoch {
		e.retired = append(e.retired, retiredList{epoch: e.epoch})
	}
	l := &e.retired[len(e.retired)-1]
	l.kss = append(l.kss, ks)
}

// spare returns the storage of a key version no held copy shows, or nil.
func (e *Engine) spare() *keyState {
	if len(e.spares) == 0 && len(e.retired) > 0 && e.views != nil {
		oldest := e.views.oldest.Load()
		n := 0
		for n < len(e.retired) && e.retired[n].epoch <= oldest {
			for _, ks := range e.retired[n].kss {
				if len(e.spares) < maxSpares {
					e.spares = append(e.spares, ks)
				}
			}
			n++
		}
		if n > 0 {
			clear(e.retired[:n])
			e.retired = append(e.retired[:0], e.retired[n:]...)
		}
	}
	n := len(e.spares)
	if n == 0 {
		return nil
	}
	ks := e.spares[n-1]
	e.spares[n-1] = nil
	e.spares = e.spares[:n-1]
	return ks
}

// nodePool recycles trie nodes as the engine recycles key versions: a node
// a copy replaced in epoch R (trieNode.owned) is reused once no published
// copy of an epoch before R is held. Nodes are kept by their room for
// children (1, 2, 4, … 32); lists of keys of one hash are left to the
// collector. A nil pool recycles nothing.
type nodePool struct {
	views   *views
	retired []retiredNodes
	spares  [6][]*trieNode
}

type retiredNodes struct {
	epoch uint64
	nodes []*trieNode
}

// roomClass returns the spares list of a node with room for c children, or
// −1 for a list.
func roomClass(c int) int {
	for i, room := range [...]int{1, 2, 4, 8, 16, 32} {
		if c == room {
			return i
		}
	}
	return -1
}

func (p *nodePool) retire(n *trieNode, epoch uint64) {
	if p == nil || roomClass(cap(n.kids)) < 0 {
		return
	}
	if k := len(p.retired); k == 0 || p.retired[k-1].epoch != epoch {
		p.retired = append(p.retired, retiredNodes{epoch: epoch})
	}
	l := &p.retired[len(p.retired)-1]
	l.nodes = append(l.nodes, n)
}

// take returns an empty node made in epoch with room for at least c
// children: a spare when there is one, else a new one.
func (p *nodePool) take(c int, epoch uint64) *trieNode {
	if p == nil {
		return newTrieNode(c, epoch)
	}
	if len(p.retired) > 0 {
		oldest := p.views.oldest.Load()
		k := 0
		for k < len(p.retired) && p.retired[k].epoch <= oldest {
			for _, n := range p.retired[k].nodes {
				if cl := roomClass(cap(n.kids)); len(p.spares[cl]) < maxSpares {
					p.spares[cl] = append(p.spares[cl], n)
				}
			}
			k++
		}
		if k > 0 {
			clear(p.retired[:k])
			p.retired = append(p.retired[:0], p.retired[k:]...)
		}
	}
	for cl, room := range [...]int{1, 2, 4, 8, 16, 32} {
		if room < c {
			continue
		}
		if k := len(p.spares[cl]); k > 0 {
			n := p.spares[cl][k-1]
			p.spares[cl][k-1] = nil
			p.spares[cl] = p.spares[cl][:k-1]
			clear(n.kids[:cap(n.kids)])
			n.kids = n.kids[:0]
			n.epoch, n.bits, n.subs = epoch, 0, 0
			return n
		}
		break // a spare with more room than needed stays for its own size
	}
	return newTrieNode(c, epoch)
}
