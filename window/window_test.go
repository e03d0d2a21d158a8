package window

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat"
)

// relTol is the tolerance for running moments against a fresh two-pass
// computation by gonum/stat; the running form loses a few ulps per update.
const relTol = 1e-10

func close(a, b, tol float64) bool {
	return math.Abs(a-b) <= tol*math.Max(1, math.Max(math.Abs(a), math.Abs(b)))
}

func mustPanic(t *testing.T, name string, f func()) {
	t.Helper()
	defer func() {
		if recover() == nil {
			t.Errorf("%s: expected a panic", name)
		}
	}()
	f()
}

func TestRingEvictsOldestFirst(t *testing.T) {
	r := NewRing[int](3)
	var evicted []int
	for v := 1; v <= 5; v++ {
		if old, ok := r.Push(v); ok {
			evicted = append(evicted, old)
		}
	}
	if got := fmt.Sprint(evicted); got != "[1 2]" {
		t.Errorf("evicted %s, want [1 2]", got)
	}
	var held []int
	for i := 0; i < r.Len(); i++ {
		held = append(held, r.At(i))
	}
	if got := fmt.Sprint(held); got != "[3 4 5]" {
		t.Errorf("held %s, want [3 4 5] (oldest first)", got)
	}
}

func TestIndexPanicsOnMisuse(t *testing.T) {
	mustPanic(t, "NewIndex(0)", func() { NewIndex(0) })
	mustPanic(t, "Pop empty", func() { x := NewIndex(2); x.Pop() })
	mustPanic(t, "Push full", func() { x := NewIndex(1); x.Push(); x.Push() })
	mustPanic(t, "Slot out of range", func() { x := NewIndex(2); x.Push(); x.Slot(1) })
	mustPanic(t, "Resize below Len", func() { x := NewIndex(2); x.Push(); x.Push(); x.Resize(1) })
	mustPanic(t, "Moments.Remove empty", func() { var m Moments; m.Remove(1) })
}

func TestTimedEvictsOlderThanNewestMinusSpan(t *testing.T) {
	w := NewTimed[string](10, 100)
	var evicted []string
	ev := func(s string) { evicted = append(evicted, s) }
	w.Push(0, "a", ev)
	w.Push(5, "b", ev)
	w.Push(3, "late", ev) // out of order: inserted at its place in time, before "b"
	w.Push(10, "c", ev)   // limit 0: "a" (t=0) stays, since 0 ≥ 10−10
	w.Push(14, "d", ev)   // limit 4: "a" and "late" (t=3) go, oldest first
	if got := fmt.Sprint(evicted); got != "[a late]" {
		t.Errorf("evicted %s, want [a late]", got)
	}
	if w.Push(2, "too late", ev) {
		t.Error("a value older than newest − span on arrival was stored")
	}
	w.Push(16, "e", ev) // limit 6: "b" (5) goes
	if got := fmt.Sprint(evicted); got != "[a late b]" {
		t.Errorf("evicted %s, want [a late b]", got)
	}
	if w.Len() != 3 {
		t.Errorf("Len %d, want 3", w.Len())
	}
}

func TestTimedCapEvictsAndGrows(t *testing.T) {
	w := NewTimed[int](1<<40, 40) // span never binds; cap 40 forces growth 16→32→40
	n := 0
	for i := 0; i < 100; i++ {
		w.Push(int64(i), i, func(int) { n++ })
	}
	if w.Len() != 40 || n != 60 {
		t.Fatalf("Len %d evicted %d, want 40 and 60", w.Len(), n)
	}
	for i := 0; i < 40; i++ {
		if v, tm := w.At(i); v != 60+i || tm != int64(60+i) {
			t.Fatalf("At(%d) = %d,%d, want %d", i, v, tm, 60+i)
		}
	}
}

// TestSlidingMomentsMatchGonum checks windowed mean and variance against
// gonum's stat.Mean and stat.Variance of the window's contents (reference
// library), after every event of a stream whose level moves.
func TestSlidingMomentsMatchGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for _, size := range []int{1, 2, 7, 100} {
		r := NewRing[float64](size)
		var m Moments
		buf := make([]float64, 0, size)
		for i := 0; i < 5000; i++ {
			x := 1e3 + 50*math.Sin(float64(i)/300) + rng.NormFloat64()
			if old, ok := r.Push(x); ok {
				m.Remove(old)
			}
			m.Add(x)
			buf = buf[:0]
			for j := 0; j < r.Len(); j++ {
				buf = append(buf, r.At(j))
			}
			if !close(m.Mean(), stat.Mean(buf, nil), relTol) {
				t.Fatalf("size %d event %d: mean %v, gonum %v", size, i, m.Mean(), stat.Mean(buf, nil))
			}
			if len(buf) > 1 && !close(m.Variance(), stat.Variance(buf, nil), 1e-7) {
				t.Fatalf("size %d event %d: variance %v, gonum %v", size, i, m.Variance(), stat.Variance(buf, nil))
			}
		}
	}
}

// TestMomentsMerge checks Chan et al.'s merge against gonum over the union.
func TestMomentsMerge(t *testing.T) {
	a := []float64{2, 4, 4, 4, 5}
	b := []float64{5, 7, 9}
	var ma, mb Moments
	for _, x := range a {
		ma.Add(x)
	}
	for _, x := range b {
		mb.Add(x)
	}
	ma.Merge(mb)
	all := append(append([]float64{}, a...), b...)
	// Hand check: the eight values 2,4,4,4,5,5,7,9 have mean 5 and population
	// variance 4 (a textbook example of standard deviation 2).
	if ma.Mean() != 5 || ma.PopVariance() != 4 {
		t.Errorf("merged mean %v popvar %v, want 5 and 4", ma.Mean(), ma.PopVariance())
	}
	if !close(ma.Variance(), stat.Variance(all, nil), 1e-14) {
		t.Errorf("merged variance %v, gonum %v", ma.Variance(), stat.Variance(all, nil))
	}
}

func ExampleRing() {
	r := NewRing[string](2)
	r.Push("a")
	r.Push("b")
	old, evicted := r.Push("c")
	fmt.Println(old, evicted, r.At(0), r.At(1))
	// Output: a true b c
}

// TestMomentsConstantAfterRemoval is issue 10's second defect at its root: a
// window whose values become all equal has variance exactly 0, even after
// other values have left it (Welford's removal left ~1e-34).
func TestMomentsConstantAfterRemoval(t *testing.T) {
	var m Moments
	for _, x := range []float64{0.1, 0.1, 0.1, 0.1, 0.1} {
		m.Add(x)
	}
	m.Add(0.3)
	m.Remove(0.3)
	if v := m.PopVariance(); v != 0 {
		t.Errorf("variance of five 0.1s after 0.3 left: %g, want exactly 0", v)
	}
	// A window that was never constant and becomes constant at another value
	// is reported imprecise; the rebuild makes the variance exactly 0.
	var w Moments
	vals := []float64{5, 0.1, 0.1, 0.1}
	for _, x := range vals {
		w.Add(x)
	}
	w.Remove(5)
	if !w.Imprecise() && w.PopVariance() != 0 {
		t.Errorf("variance %g and not imprecise", w.PopVariance())
	}
	w.Rebuild(3, func(i int) float64 { return vals[i+1] })
	if w.PopVariance() != 0 || w.Mean() != 0.1 || w.Imprecise() {
		t.Errorf("after rebuild: variance %g mean %v imprecise %v, want 0, 0.1, false", w.PopVariance(), w.Mean(), w.Imprecise())
	}
}

// TestSumHugeValueLeaves: a value 1e20 times larger (its unit in the last place is 16384) than the rest enters and
// leaves; the sum of what remains is exact to the last bit. Hand check: the
// remaining values are 1000 copies of 0.5 and 1000 of −0.25, sum 250.
func TestSumHugeValueLeaves(t *testing.T) {
	var s Sum
	s.Add(1e20)
	for i := 0; i < 1000; i++ {
		s.Add(0.5)
		s.Add(-0.25)
	}
	s.Sub(1e20)
	if s.Value() != 250 {
		t.Errorf("sum %v, want 250", s.Value())
	}
	// The bound is what an owner compares with the sum's scale: here it
	// stays far below 1e-9 of the remaining sum, so no rebuild is asked for.
	if s.Bound() > 1e-9*250 {
		t.Errorf("bound %g", s.Bound())
	}
}
