package window

// Ring is a count-bounded FIFO of values: pushing onto a full ring evicts the
// oldest value. Storage is allocated once, in NewRing; Push and At allocate
// nothing.
type Ring[T any] struct {
	buf []T
	idx Index
}

// NewRing returns an empty ring of capacity n. It panics if n < 1.
func NewRing[T any](n int) *Ring[T] {
	return &Ring[T]{buf: make([]T, n), idx: NewIndex(n)}
}

// Len returns the number of values held; Cap the bound.
func (r *Ring[T]) Len() int { return r.idx.Len() }

// Cap returns the ring's bound.
func (r *Ring[T]) Cap() int { return r.idx.Size() }

// Push appends v as the newest value. When the ring was full it evicts the
// oldest value and returns it with evicted true.
func (r *Ring[T]) Push(v T) (old T, evicted bool) {
	if r.idx.Full() {
		s := r.idx.Pop()
		old, evicted = r.buf[s], true
	}
	r.buf[r.idx.Push()] = v
	return old, evicted
}

// At returns the i-th oldest value, 0 ≤ i < Len.
func (r *Ring[T]) At(i int) T { return r.buf[r.idx.Slot(i)] }

// Reset empties the ring, keeping its storage.
func (r *Ring[T]) Reset() { r.idx.Reset() }
