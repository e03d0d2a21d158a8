package learner

import (
	"slices"

	"tidemark/window"
)

// rows is the window of labelled rows a windowed learner keeps: d features,
// a target and an event time per row, rows stored contiguously in slot order
// (slot s occupies x[s*d:(s+1)*d]) so that a scan over the window streams
// through memory. Its bookkeeping is a window.Index.
//
// Bounds: a Count window holds the last Count rows (in arrival order),
// storage starting at a few rows and doubling up to Count, so that a key
// with few events costs few rows; a Span window holds the rows whose time t
// satisfies t ≥ newest − Span (inclusive; newest = the latest event time
// seen), kept in order of event time (rows of equal time in arrival order),
// and an All window every row, both up to max rows, storage doubling from a
// small start. A row that arrives late is inserted at its place in time; one
// already older than the bound on arrival is not stored (late reports it).
type rows struct {
	d      int
	x      []float64
	y      []float64
	t      []int64
	idx    window.Index
	span   int64
	limit  int // hard cap on rows held
	newest int64
	seen   bool
}

// Initial storage, in rows: of a count window (small, since a key may see
// few events; doubling amortises the growth), and of a time or "all" window.
const (
	rowsInitialCount = 2
	rowsInitial      = 64
)

func newRows(d int, w Window, max int) rows {
	r := rows{d: d, span: int64(w.Span), limit: max}
	size := min(max, rowsInitial)
	if w.Count > 0 {
		r.limit, size = w.Count, min(w.Count, rowsInitialCount)
	}
	r.alloc(size)
	return r
}

func (r *rows) alloc(size int) {
	r.x, r.y, r.t = make([]float64, size*r.d), make([]float64, size), make([]int64, size)
	r.idx = window.NewIndex(size)
}

func (r *rows) len() int { return r.idx.Len() }

// held estimates the bytes of the rows held: features, target and time.
func (r *rows) held() int64 { return int64(r.idx.Len()) * int64(8*r.d+16) }

// touch reads the newest row's target and time (see Learner.touch).
func (r *rows) touch() float64 {
	if r.idx.Len() == 0 {
		return 0
	}
	s := r.idx.Slot(r.idx.Len() - 1)
	v := r.y[s] + float64(r.t[s])
	if r.d > 0 {
		v += r.x[s*r.d]
	}
	return v
}

// cloneInto returns a copy of r in into's storage when it has r's shape,
// else an independent copy (clone).
func (r *rows) cloneInto(into rows) rows {
	if len(into.x) != len(r.x) || len(into.y) != len(r.y) || len(into.t) != len(r.t) {
		return r.clone()
	}
	c := *r
	copy(into.x, r.x)
	copy(into.y, r.y)
	copy(into.t, r.t)
	c.x, c.y, c.t = into.x, into.y, into.t
	return c
}

// clone returns an independent copy.
func (r *rows) clone() rows {
	c := *r
	c.x, c.y, c.t = slices.Clone(r.x), slices.Clone(r.y), slices.Clone(r.t)
	return c
}

// row returns the features in slot s.
func (r *rows) row(s int) []float64 { return r.x[s*r.d : (s+1)*r.d : (s+1)*r.d] }

// advance moves the clock to t when it is later than the newest time seen.
func (r *rows) advance(t int64) {
	if !r.seen || t > r.newest {
		r.newest, r.seen = t, true
	}
}

// late reports whether a row at time t lies outside a time window's bound on
// arrival (t < newest − Span, once the clock has moved to t): it would be
// evicted at once, so it is not stored.
func (r *rows) late(t int64) bool {
	return r.span != 0 && r.seen && t < r.newest-r.span
}

// popExpired removes the oldest row if a time window no longer covers it and
// returns its slot, readable until the next push. Rows of a time window are
// in time order, so the oldest is the first.
func (r *rows) popExpired() (slot int, ok bool) {
	if r.span == 0 || r.idx.Len() == 0 {
		return 0, false
	}
	s := r.idx.Slot(0)
	if r.t[s] >= r.newest-r.span {
		return 0, false
	}
	return r.idx.Pop(), true
}

// makeRoom ensures there is a free slot for one more row: it grows storage
// while below the cap, and otherwise evicts the oldest row, returning its slot.
func (r *rows) makeRoom() (slot int, ok bool) {
	if !r.idx.Full() {
		return 0, false
	}
	if n := r.idx.Size(); n < r.limit {
		r.grow(min(2*n, r.limit))
		return 0, false
	}
	return r.idx.Pop(), true
}

func (r *rows) grow(size int) {
	old := *r
	r.alloc(size)
	for i := 0; i < old.idx.Len(); i++ {
		s := old.idx.Slot(i)
		copy(r.row(i), old.row(s))
		r.y[i], r.t[i] = old.y[s], old.t[s]
	}
	r.idx.Restore(size, old.idx.Len())
}

// push stores a row in the slot makeRoom freed. In a time window a row older
// than the newest held moves back to its place in time, after the rows of
// the same time: cost O(d) per row it passes, nothing for rows in order.
func (r *rows) push(x []float64, y float64, t int64) {
	s := r.idx.Push()
	i := r.idx.Len() - 1
	if r.span != 0 {
		for ; i > 0; i-- {
			prev := r.idx.Slot(i - 1)
			if r.t[prev] <= t {
				break
			}
			copy(r.row(s), r.row(prev))
			r.y[s], r.t[s] = r.y[prev], r.t[prev]
			s = prev
		}
	}
	copy(r.row(s), x)
	r.y[s], r.t[s] = y, t
}

func (r *rows) encode(w *encoder) {
	w.int(r.d)
	w.i64(r.newest)
	w.bool(r.seen)
	n := r.idx.Len()
	w.int(n)
	for i := 0; i < n; i++ {
		s := r.idx.Slot(i)
		for _, v := range r.row(s) {
			w.f64(v)
		}
		w.f64(r.y[s])
		w.i64(r.t[s])
	}
}

func (r *rows) decode(dec *decoder) {
	dec.expect(r.d, "row dimension")
	r.newest = dec.i64()
	r.seen = dec.bool()
	n := dec.count(r.limit, 8*(r.d+2))
	if dec.err != nil {
		return
	}
	size := r.idx.Size()
	for size < n {
		size = min(2*size, r.limit)
	}
	r.alloc(size)
	for i := 0; i < n; i++ {
		for j := range r.row(i) {
			r.row(i)[j] = dec.f64()
		}
		r.y[i] = dec.f64()
		r.t[i] = dec.i64()
	}
	r.idx.Restore(size, n)
	if r.span != 0 && dec.err == nil && !r.timeOrdered(n) {
		if dec.ver >= 5 {
			dec.fail("time window out of time order")
			return
		}
		// Before state version 5 a time window kept late rows in arrival
		// order; put them in time order (stably). Rows older than the
		// window's bound leave at the next Advance.
		r.sortByTime(n)
	}
}

func (r *rows) timeOrdered(n int) bool {
	for i := 1; i < n; i++ {
		if r.t[i] < r.t[i-1] {
			return false
		}
	}
	return true
}

// sortByTime orders the first n slots (slot i = the i-th oldest, as decode
// leaves them) by time, stably, by insertion. Only for old states.
func (r *rows) sortByTime(n int) {
	tmp := make([]float64, r.d)
	for i := 1; i < n; i++ {
		for j := i; j > 0 && r.t[j] < r.t[j-1]; j-- {
			copy(tmp, r.row(j))
			copy(r.row(j), r.row(j-1))
			copy(r.row(j-1), tmp)
			r.y[j], r.y[j-1] = r.y[j-1], r.y[j]
			r.t[j], r.t[j-1] = r.t[j-1], r.t[j]
		}
	}
}
