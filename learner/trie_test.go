package learner

import (
	"fmt"
	"maps"
	"math/rand/v2"
	"testing"
)

// TestTrieKeepsEveryPublishedVersion checks the persistent trie against a
// map (the reference) copied at each epoch's end: over eight epochs of new
// keys, new versions of old ones and keys taken out, every root ever returned still finds
// exactly the states of its epoch, and lists exactly them. Hashes are made
// to collide: keys sharing their low 5, 10, …, 60 bits, and 40 keys of one
// whole hash (a list longer than a full node).
func TestTrieKeepsEveryPublishedVersion(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	var hashes []uint64
	for i := 0; i < 600; i++ {
		hashes = append(hashes, rng.Uint64())
	}
	for bitsEqual := 5; bitsEqual <= 60; bitsEqual += 5 {
		base := rng.Uint64()
		for i := 0; i < 3; i++ {
			hashes = append(hashes, base&(1<<bitsEqual-1)|rng.Uint64()<<bitsEqual)
		}
	}
	same := rng.Uint64()
	for i := 0; i < 40; i++ {
		hashes = append(hashes, same)
	}
	rng.Shuffle(len(hashes), func(i, j int) { hashes[i], hashes[j] = hashes[j], hashes[i] })

	var root *trieNode
	want := map[string]*keyState{}
	type published struct {
		root *trieNode
		want map[string]*keyState
	}
	var pubs []published
	next := 0
	for epoch := uint64(0); epoch < 8; epoch++ {
		for n := 0; n < len(hashes)/8 && next < len(hashes); n++ { // new keys
			ks := &keyState{key: fmt.Sprintf("k%d", next), hash: hashes[next]}
			next++
			root = root.with(ks, 0, epoch, nil)
			want[ks.key] = ks
		}
		for key, old := range want { // new versions of some keys, some twice
			if rng.IntN(3) == 0 {
				for v := 0; v <= rng.IntN(2); v++ {
					ks := &keyState{key: key, hash: old.hash}
					root = root.with(ks, 0, epoch, nil)
					want[key] = ks
				}
			}
		}
		for key, ks := range want { // some keys leave (Split)
			if rng.IntN(9) == 0 {
				root = root.without(key, ks.hash, 0, epoch, nil)
				delete(want, key)
			}
		}
		root = root.without("absent", same, 0, epoch, nil)
		pubs = append(pubs, published{root, maps.Clone(want)})
	}
	for e, p := range pubs {
		for key, ks := range p.want {
			if got := p.root.get(key, ks.hash); got != ks {
				t.Fatalf("epoch %d: %s found %p, want %p", e, key, got, ks)
			}
		}
		if got := p.root.get("absent", same); got != nil {
			t.Fatalf("epoch %d: an absent key of a present hash found", e)
		}
		seen := map[string]*keyState{}
		p.root.each(func(ks *keyState) { seen[ks.key] = ks })
		if !maps.Equal(seen, p.want) {
			t.Fatalf("epoch %d: each lists %d states, want the %d of the epoch", e, len(seen), len(p.want))
		}
	}
}
