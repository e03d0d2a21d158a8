package window

// Timed is an event-time-bounded window of values: after a push at time t it
// holds only the values whose time is at least newest − span (inclusive),
// where newest is the latest time pushed so far. Values are kept in order of
// time (equal times in arrival order): one that arrives out of order is
// inserted at its place, and one already older than newest − span on arrival
// is not stored (Push reports it).
// A count cap bounds its memory: pushing onto a window that already holds cap
// values evicts the oldest one whatever its time. Storage starts small and
// doubles up to cap, so a window that only ever holds a few values stays small.
//
// Times are int64 in whatever unit the caller uses (tidemark uses Unix
// nanoseconds); Timed never reads a clock.
type Timed[T any] struct {
	vals   []T
	times  []int64
	idx    Index
	span   int64
	cap    int
	newest int64
	seen   bool
}

// NewTimed returns an empty window of the given span, holding at most cap
// values. It panics if span < 1 or cap < 1.
func NewTimed[T any](span int64, cap int) *Timed[T] {
	if span < 1 || cap < 1 {
		panic(errBound)
	}
	n := min(cap, 16)
	return &Timed[T]{vals: make([]T, n), times: make([]int64, n), idx: NewIndex(n), span: span, cap: cap}
}

// Len returns the number of values held.
func (w *Timed[T]) Len() int { return w.idx.Len() }

// At returns the i-th oldest value and its time, 0 ≤ i < Len.
func (w *Timed[T]) At(i int) (T, int64) {
	s := w.idx.Slot(i)
	return w.vals[s], w.times[s]
}

// Advance moves the window's clock to t (if t is later than the newest time
// seen) and evicts every value older than newest − span, oldest first, calling
// evict on each when evict is not nil.
func (w *Timed[T]) Advance(t int64, evict func(T)) {
	if !w.seen || t > w.newest {
		w.newest, w.seen = t, true
	}
	limit := w.newest - w.span
	for w.idx.Len() > 0 {
		s := w.idx.Slot(0)
		if w.times[s] >= limit {
			break
		}
		w.idx.Pop()
		if evict != nil {
			evict(w.vals[s])
		}
	}
}

// Push advances the clock to t, evicting as Advance does, then inserts v at
// its place in time; it returns false, storing nothing, when t is already
// older than newest − span. If the window holds cap values the oldest is
// evicted first. Cost O(1) for a value in order, plus one move per newer
// value it passes.
func (w *Timed[T]) Push(t int64, v T, evict func(T)) bool {
	w.Advance(t, evict)
	if t < w.newest-w.span {
		return false
	}
	if w.idx.Full() {
		if w.idx.Size() < w.cap {
			w.grow()
		} else {
			s := w.idx.Pop()
			if evict != nil {
				evict(w.vals[s])
			}
		}
	}
	s := w.idx.Push()
	for i := w.idx.Len() - 1; i > 0; i-- {
		prev := w.idx.Slot(i - 1)
		if w.times[prev] <= t {
			break
		}
		w.vals[s], w.times[s] = w.vals[prev], w.times[prev]
		s = prev
	}
	w.vals[s], w.times[s] = v, t
	return true
}

func (w *Timed[T]) grow() {
	n := min(2*w.idx.Size(), w.cap)
	vals, times := make([]T, n), make([]int64, n)
	for i := 0; i < w.idx.Len(); i++ {
		s := w.idx.Slot(i)
		vals[i], times[i] = w.vals[s], w.times[s]
	}
	w.vals, w.times = vals, times
	w.idx.Resize(n)
}
