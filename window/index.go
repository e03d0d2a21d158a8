package window

// Index is the bookkeeping of a FIFO ring buffer whose storage the caller owns:
// it maps the i-th oldest element to a slot in [0, Size). Callers keep parallel
// arrays (rows of features, targets, times) and ask Index where each lives,
// which lets a window of d-dimensional rows sit in one contiguous slice.
//
// The zero Index has size 0 and holds nothing; use NewIndex or Resize.
type Index struct {
	head int // slot of the oldest element
	n    int
	size int
}

// NewIndex returns an empty index over size slots. It panics if size < 1.
func NewIndex(size int) Index {
	if size < 1 {
		panic(errBound)
	}
	return Index{size: size}
}

// Len returns the number of elements held.
func (x *Index) Len() int { return x.n }

// Size returns the number of slots.
func (x *Index) Size() int { return x.size }

// Full reports whether every slot is taken.
func (x *Index) Full() bool { return x.n == x.size }

// Slot returns the slot of the i-th oldest element, 0 ≤ i < Len. Cost O(1).
func (x *Index) Slot(i int) int {
	if i < 0 || i >= x.n {
		panic(errRange)
	}
	s := x.head + i
	if s >= x.size {
		s -= x.size
	}
	return s
}

// Push appends a new newest element and returns its slot. It panics if the
// index is full: the caller decides whether to Pop (evict) or Resize first.
func (x *Index) Push() int {
	if x.n == x.size {
		panic(errFull)
	}
	s := x.head + x.n
	if s >= x.size {
		s -= x.size
	}
	x.n++
	return s
}

// Pop removes the oldest element and returns the slot it occupied, which the
// caller may still read until the next Push. It panics if the index is empty.
func (x *Index) Pop() int {
	if x.n == 0 {
		panic(errEmpty)
	}
	s := x.head
	x.head++
	if x.head == x.size {
		x.head = 0
	}
	x.n--
	return s
}

// Resize records that the caller has copied its elements, oldest first, into
// slots 0..Len-1 of new storage with size slots. It panics if size < Len or
// size < 1. Use it to grow a window whose storage doubles up to a cap.
func (x *Index) Resize(size int) {
	if size < 1 {
		panic(errBound)
	}
	if size < x.n {
		panic(errShrink)
	}
	x.head = 0
	x.size = size
}

// Reset empties the index, keeping its size.
func (x *Index) Reset() { x.head, x.n = 0, 0 }

// Restore sets the index to hold n elements in slots 0..n-1 of size slots, as
// after Resize. Decoders of saved windows use it. It panics if n > size.
func (x *Index) Restore(size, n int) {
	if size < 1 {
		panic(errBound)
	}
	if n < 0 || n > size {
		panic(errShrink)
	}
	x.head, x.n, x.size = 0, n, size
}
