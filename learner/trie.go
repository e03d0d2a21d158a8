package learner

import (
	"math/bits"
	"unsafe"
)

// trieNode is a node of a persistent hash array mapped trie from keys to
// their state (Bagwell 2001, "Ideal Hash Trees", EPFL technical report
// 169246): each level takes five bits of the key's 64-bit hash; a node holds
// only the children that exist, found by the population count of a bitmap.
// Past the hash's 64 bits, keys of equal hash share a list (a node whose
// bits are zero).
//
// It is what a published engine looks keys up in. Nodes are changed in place
// only by the engine that made them and only in the epoch they were made in;
// a publish ends the epoch, and a change after it copies the path from the
// root to the key (at most 13 nodes, about 4 at a million keys), so a
// published root never changes and what a publish costs follows the keys
// that changed, not the number of keys.
//
// What a path copy costs is the nodes' size, so a node is kept small: a
// child is one word, a subtrie or a key's state as a second bitmap says
// (as in Steindorfer & Vinju 2015, "Optimizing hash-array mapped tries for
// fast and lean immutable JVM collections", OOPSLA), and the children are
// in one allocation with the node, with room for a power of two of them.
type trieNode struct {
	epoch uint64
	bits  uint32           // the children present, by five bits of the hash
	subs  uint32           // of those, the subtries; the others are keys
	kids  []unsafe.Pointer // one per bit of bits, in bit order: *trieNode or *keyState
}

const trieBits = 5

// with returns the trie t (nil for empty) with ks set under its key, changing
// nodes of the given epoch in place and copying older ones.
func (t *trieNode) with(ks *keyState, shift uint, epoch uint64, pool *nodePool) *trieNode {
	if shift >= 64 { // the whole hash is equal: a list
		n := t.owned(epoch, 1, pool)
		for i, p := range n.kids {
			if (*keyState)(p).key == ks.key {
				n.kids[i] = unsafe.Pointer(ks)
				return n
			}
		}
		return n.insert(len(n.kids), unsafe.Pointer(ks))
	}
	bit := uint32(1) << (ks.hash >> shift & (1<<trieBits - 1))
	if t == nil || t.bits&bit == 0 {
		n := t.owned(epoch, 1, pool)
		n = n.insert(bits.OnesCount32(n.bits&(bit-1)), unsafe.Pointer(ks))
		n.bits |= bit
		return n
	}
	n := t.owned(epoch, 0, pool)
	pos := bits.OnesCount32(n.bits & (bit - 1))
	switch p := n.kids[pos]; {
	case n.subs&bit != 0:
		n.kids[pos] = unsafe.Pointer((*trieNode)(p).with(ks, shift+trieBits, epoch, pool))
	case (*keyState)(p).key == ks.key:
		n.kids[pos] = unsafe.Pointer(ks)
	default: // two keys in one place: push the one there down a level
		sub := (*trieNode)(nil).with((*keyState)(p), shift+trieBits, epoch, pool)
		n.kids[pos] = unsafe.Pointer(sub.with(ks, shift+trieBits, epoch, pool))
		n.subs |= bit
	}
	return n
}

// owned returns t if it was made in epoch, else a copy made in it (nil: an
// empty node) with room for more children; the copy replaces t, which pool
// (nil: none) may reuse once no published copy shows it.
func (t *trieNode) owned(epoch uint64, more int, pool *nodePool) *trieNode {
	if t != nil && t.epoch == epoch {
		return t
	}
	if t == nil {
		return pool.take(more, epoch)
	}
	pool.retire(t, epoch)
	n := pool.take(len(t.kids)+more, epoch)
	n.bits, n.subs = t.bits, t.subs
	n.kids = append(n.kids, t.kids...)
	return n
}

// insert puts p at pos among n's children, n made in the current epoch; when
// n is full it moves to a node with room, which it returns.
func (n *trieNode) insert(pos int, p unsafe.Pointer) *trieNode {
	if len(n.kids) == cap(n.kids) {
		m := newTrieNode(len(n.kids)+1, n.epoch)
		m.bits, m.subs = n.bits, n.subs
		m.kids = append(m.kids, n.kids...)
		n = m
	}
	n.kids = n.kids[:len(n.kids)+1]
	copy(n.kids[pos+1:], n.kids[pos:])
	n.kids[pos] = p
	return n
}

// newTrieNode returns an empty node with room for at least c children, in
// one allocation with it up to 32 (a full level).
func newTrieNode(c int, epoch uint64) *trieNode {
	var n *trieNode
	switch {
	case c <= 1:
		n = nodeWith(func(a *[1]unsafe.Pointer) []unsafe.Pointer { return a[:0] })
	case c <= 2:
		n = nodeWith(func(a *[2]unsafe.Pointer) []unsafe.Pointer { return a[:0] })
	case c <= 4:
		n = nodeWith(func(a *[4]unsafe.Pointer) []unsafe.Pointer { return a[:0] })
	case c <= 8:
		n = nodeWith(func(a *[8]unsafe.Pointer) []unsafe.Pointer { return a[:0] })
	case c <= 16:
		n = nodeWith(func(a *[16]unsafe.Pointer) []unsafe.Pointer { return a[:0] })
	case c <= 32:
		n = nodeWith(func(a *[32]unsafe.Pointer) []unsafe.Pointer { return a[:0] })
	default: // a list of keys of one hash past 32
		n = &trieNode{kids: make([]unsafe.Pointer, 0, c)}
	}
	n.epoch = epoch
	return n
}

// nodeWith allocates a node followed by the array A of its children.
func nodeWith[A any](kids func(*A) []unsafe.Pointer) *trieNode {
	b := new(struct {
		n trieNode
		a A
	})
	b.n.kids = kids(&b.a)
	return &b.n
}

// get returns the state of key, whose hash is h, or nil.
func (t *trieNode) get(key string, h uint64) *keyState {
	for shift := uint(0); t != nil; shift += trieBits {
		if shift >= 64 {
			for _, p := range t.kids {
				if ks := (*keyState)(p); ks.key == key {
					return ks
				}
			}
			return nil
		}
		bit := uint32(1) << (h >> shift & (1<<trieBits - 1))
		if t.bits&bit == 0 {
			return nil
		}
		p := t.kids[bits.OnesCount32(t.bits&(bit-1))]
		if t.subs&bit == 0 {
			if ks := (*keyState)(p); ks.key == key {
				return ks
			}
			return nil
		}
		t = (*trieNode)(p)
	}
	return nil
}

// each calls f with every key's state, in no particular order.
func (t *trieNode) each(f func(*keyState)) {
	if t == nil {
		return
	}
	subs := t.subs
	for b, i := t.bits, 0; i < len(t.kids); i++ {
		low := b & -b // the child's bit (a list has none: keys only)
		b &^= low
		if subs&low != 0 {
			(*trieNode)(t.kids[i]).each(f)
		} else {
			f((*keyState)(t.kids[i]))
		}
	}
}

// without returns the trie t with key (of hash h) taken out, changing nodes
// of the given epoch in place and copying older ones; a node left empty is
// dropped (nil). A key that is not there changes nothing.
func (t *trieNode) without(key string, h uint64, shift uint, epoch uint64, pool *nodePool) *trieNode {
	if t == nil {
		return nil
	}
	if shift >= 64 {
		for i, p := range t.kids {
			if (*keyState)(p).key == key {
				n := t.owned(epoch, 0, pool)
				copy(n.kids[i:], n.kids[i+1:])
				n.kids[len(n.kids)-1] = nil
				n.kids = n.kids[:len(n.kids)-1]
				if len(n.kids) == 0 {
					return nil
				}
				return n
			}
		}
		return t
	}
	bit := uint32(1) << (h >> shift & (1<<trieBits - 1))
	if t.bits&bit == 0 {
		return t
	}
	pos := bits.OnesCount32(t.bits & (bit - 1))
	var sub *trieNode
	if t.subs&bit != 0 {
		old := (*trieNode)(t.kids[pos])
		if sub = old.without(key, h, shift+trieBits, epoch, pool); sub == old {
			return t
		}
	} else if (*keyState)(t.kids[pos]).key != key {
		return t
	}
	n := t.owned(epoch, 0, pool)
	if sub != nil {
		n.kids[pos] = unsafe.Pointer(sub)
		return n
	}
	copy(n.kids[pos:], n.kids[pos+1:])
	n.kids[len(n.kids)-1] = nil
	n.kids = n.kids[:len(n.kids)-1]
	n.bits &^= bit
	n.subs &^= bit
	if len(n.kids) == 0 {
		return nil
	}
	return n
}
