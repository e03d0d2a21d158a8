package learner

// keyIndex finds a key's state by the key's 64-bit hash (maphash with the
// engine's seed, kept in keyState.hash). A map keyed by the hash holds its
// keys in its own table, so growing it rehashes numbers it already has
// instead of reading every key's name from wherever it lies in memory (with a
// million keys, a cache miss per key at each growth), and an entry costs 16
// bytes instead of 24. The name is compared once the hash has found a state.
// Two names with one hash are possible, if rare: the second goes to more.
type keyIndex struct {
	byHash map[uint64]*keyState
	more   map[string]*keyState // keys whose hash a key in byHash already has
}

func newKeyIndex(n int) keyIndex {
	return keyIndex{byHash: make(map[uint64]*keyState, n)}
}

// get returns the state of key, whose hash is h, or nil.
func (x *keyIndex) get(key string, h uint64) *keyState {
	if ks := x.byHash[h]; ks != nil && ks.key == key {
		return ks
	}
	if x.more != nil {
		return x.more[key]
	}
	return nil
}

// set adds ks, or replaces the state of its key.
func (x *keyIndex) set(ks *keyState) {
	old := x.byHash[ks.hash]
	switch {
	case old == nil || old.key == ks.key:
		x.byHash[ks.hash] = ks
	default:
		if x.more == nil {
			x.more = map[string]*keyState{}
		}
		x.more[ks.key] = ks
	}
}

// remove takes ks's key out.
func (x *keyIndex) remove(ks *keyState) {
	if old := x.byHash[ks.hash]; old != nil && old.key == ks.key {
		delete(x.byHash, ks.hash)
		// A key of the same hash waiting in more takes the place.
		for k, o := range x.more {
			if o.hash == ks.hash {
				x.byHash[ks.hash] = o
				delete(x.more, k)
				break
			}
		}
		return
	}
	delete(x.more, ks.key)
}

// len returns the number of keys.
func (x *keyIndex) len() int { return len(x.byHash) + len(x.more) }
