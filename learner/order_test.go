package learner

import (
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
)

// TestSortByKeyOrdersAsStrings: the fast sort puts keys in the order of the
// standard library's string comparison (the reference), with shared prefixes
// of every length, zero bytes, empty and long names, and duplicates of none.
func TestSortByKeyOrdersAsStrings(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	alphabet := []byte{0, 1, 'a', 'b', 'z', 0xff}
	for trial := 0; trial < 300; trial++ {
		prefix := strings.Repeat("p", rng.IntN(20))
		seen := map[string]bool{}
		var kss []*keyState
		for n := rng.IntN(200); len(kss) < n; {
			b := []byte(prefix)
			for k := rng.IntN(12); k > 0; k-- {
				b = append(b, alphabet[rng.IntN(len(alphabet))])
			}
			if s := string(b); !seen[s] {
				seen[s] = true
				kss = append(kss, &keyState{key: s})
			}
		}
		want := slices.Clone(kss)
		slices.SortFunc(want, func(a, b *keyState) int { return strings.Compare(a.key, b.key) })
		sortByKey(kss)
		for i := range kss {
			if kss[i] != want[i] {
				t.Fatalf("trial %d (prefix %d bytes): place %d holds %q, want %q", trial, len(prefix), i, kss[i].key, want[i].key)
			}
		}
	}
}
