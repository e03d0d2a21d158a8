package learner

import (
	"math/bits"
	"slices"
)

// trieNode is a node of a persistent hash array mapped trie from keys to
// their state (Bagwell 2001, "Ideal Hash Trees", EPFL technical report
// 169246): each level takes five bits of the key's 64-bit hash; a node holds
// only the children that exist, found by the population count of a bitmap.
// Past the hash's 64 bits, keys of equal hash share a list.
//
// It is what a published engine looks keys up in. Nodes are changed in place
// only by the engine that made them and only in the epoch they were made in;
// a publish ends the epoch, and a change after it copies the path from the
// root to the key (at most 13 nodes, about 4 at a million keys), so a
// published root never changes and what a publish costs follows the keys
// that changed, not the number of keys.
type trieNode struct {
	epoch uint64
	bits  uint32
	kids  []trieKid
}

// trieKid is a child: a subtrie or a key's state.
type trieKid struct {
	node *trieNode
	ks   *keyState
}

const trieBits = 5

// with returns the trie t (nil for empty) with ks set under its key, changing
// nodes of the given epoch in place and copying older ones.
func (t *trieNode) with(ks *keyState, shift uint, epoch uint64) *trieNode {
	n := t
	switch {
	case n == nil:
		n = &trieNode{epoch: epoch}
	case n.epoch != epoch:
		n = &trieNode{epoch: epoch, bits: t.bits, kids: slices.Clone(t.kids)}
	}
	if shift >= 64 { // the whole hash is equal: a list
		for i := range n.kids {
			if n.kids[i].ks.key == ks.key {
				n.kids[i].ks = ks
				return n
			}
		}
		n.kids = append(n.kids, trieKid{ks: ks})
		return n
	}
	bit := uint32(1) << (ks.hash >> shift & (1<<trieBits - 1))
	pos := bits.OnesCount32(n.bits & (bit - 1))
	if n.bits&bit == 0 {
		n.kids = slices.Insert(n.kids, pos, trieKid{ks: ks})
		n.bits |= bit
		return n
	}
	k := &n.kids[pos]
	switch {
	case k.node != nil:
		k.node = k.node.with(ks, shift+trieBits, epoch)
	case k.ks.key == ks.key:
		k.ks = ks
	default: // two keys in one place: push the one there down a level
		sub := (*trieNode)(nil).with(k.ks, shift+trieBits, epoch)
		*k = trieKid{node: sub.with(ks, shift+trieBits, epoch)}
	}
	return n
}

// get returns the state of key, whose hash is h, or nil.
func (t *trieNode) get(key string, h uint64) *keyState {
	for shift := uint(0); t != nil; shift += trieBits {
		if shift >= 64 {
			for _, k := range t.kids {
				if k.ks.key == key {
					return k.ks
				}
			}
			return nil
		}
		bit := uint32(1) << (h >> shift & (1<<trieBits - 1))
		if t.bits&bit == 0 {
			return nil
		}
		k := t.kids[bits.OnesCount32(t.bits&(bit-1))]
		if k.node == nil {
			if k.ks.key == key {
				return k.ks
			}
			return nil
		}
		t = k.node
	}
	return nil
}

// each calls f with every key's state, in no particular order.
func (t *trieNode) each(f func(*keyState)) {
	if t == nil {
		return
	}
	for _, k := range t.kids {
		if k.node != nil {
			k.node.each(f)
		} else {
			f(k.ks)
		}
	}
}
