package learner

import (
	"cmp"
	"encoding/binary"
	"slices"
	"strings"
)

// sortByKey sorts key states by key. With a million keys a comparison that
// reads two names from wherever they lie in memory waits on the cache
// twice; here each state and name is read once, into a list of (8 bytes of
// the name, state) that the sort compares as numbers, reading names only
// where those 8 bytes tie. The 8 bytes are those after the prefix every name
// shares, so that names like "meter-123456" are told apart by their digits:
// big-endian and padded with zeros, they order as the bytes do, and a tie
// (equal bytes, or a zero byte against the padding) falls back to comparing
// the names.
func sortByKey(kss []*keyState) {
	if len(kss) < 2 {
		return
	}
	type item struct {
		hi, lo uint64 // the name's first 16 bytes, then the 8 after the shared prefix in hi
		ks     *keyState
	}
	items := make([]item, len(kss))
	common := len(kss[0].key)
	first := kss[0].key
	var b [16]byte
	for i, ks := range kss {
		clear(b[:])
		copy(b[:], ks.key)
		items[i] = item{binary.BigEndian.Uint64(b[:8]), binary.BigEndian.Uint64(b[8:]), ks}
		n := 0
		for n < common && n < len(ks.key) && first[n] == ks.key[n] {
			n++
		}
		common = n
	}
	for i := range items {
		it := &items[i]
		switch {
		case common == 0:
		case common < 8:
			it.hi = it.hi<<(8*common) | it.lo>>(64-8*common)
		case common == 8:
			it.hi = it.lo
		default: // rare: read the bytes after a long shared prefix
			clear(b[:8])
			copy(b[:8], it.ks.key[common:])
			it.hi = binary.BigEndian.Uint64(b[:8])
		}
	}
	slices.SortFunc(items, func(a, b item) int {
		if c := cmp.Compare(a.hi, b.hi); c != 0 {
			return c
		}
		return strings.Compare(a.ks.key, b.ks.key)
	})
	for i := range items {
		kss[i] = items[i].ks
	}
}
