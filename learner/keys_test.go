package learner

import "testing"

// TestKeyIndexKeepsKeysOfOneHashApart: two names with the same 64-bit hash
// (made so here; with a 64-bit hash a pair among a million keys has a
// chance of about n²/2⁶⁵ ≈ 3·10⁻⁸, the birthday bound) are
// two keys, each found by its name and replaced on its own.
func TestKeyIndexKeepsKeysOfOneHashApart(t *testing.T) {
	x := newKeyIndex(0)
	a := &keyState{key: "a", hash: 7}
	b := &keyState{key: "b", hash: 7}
	c := &keyState{key: "c", hash: 8}
	for _, ks := range []*keyState{a, b, c} {
		x.set(ks)
	}
	if x.len() != 3 {
		t.Fatalf("len %d, want 3", x.len())
	}
	for _, ks := range []*keyState{a, b, c} {
		if got := x.get(ks.key, ks.hash); got != ks {
			t.Errorf("get(%q) = %v, want its state", ks.key, got)
		}
	}
	if got := x.get("d", 7); got != nil {
		t.Errorf("get of an absent name with a present hash = %v", got)
	}
	b2 := &keyState{key: "b", hash: 7}
	a2 := &keyState{key: "a", hash: 7}
	x.set(b2)
	x.set(a2)
	if x.len() != 3 || x.get("a", 7) != a2 || x.get("b", 7) != b2 {
		t.Errorf("replacing: len %d, a %p (want %p), b %p (want %p)", x.len(), x.get("a", 7), a2, x.get("b", 7), b2)
	}
}
