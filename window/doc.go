// Package window keeps bounded windows over a stream: the bookkeeping of a
// count-bounded ring, a generic ring of values, an event-time-bounded window,
// and running sums and moments that support both adding and removing a value
// without rounding error building up (compensated, with a rounding bound that
// tells the owner when to rebuild from the window's contents).
//
// Invariants, for every type here:
//   - bounds are fixed at construction;
//   - the oldest element is evicted first; elements keep arrival order, except
//     in an event-time window, which keeps them in order of time;
//   - nothing here reads a clock: time comes only from the values pushed.
//
// None of the types is safe for concurrent use; the owner serialises access.
// Shape errors made by a caller (popping an empty ring, a non-positive bound)
// panic with a message that starts with "window:"; there is no data-dependent
// failure in this package.
package window

const (
	errEmpty   = "window: pop from an empty window"
	errFull    = "window: push onto a full index"
	errBound   = "window: bound must be positive"
	errRange   = "window: index out of range"
	errShrink  = "window: new size smaller than length"
	errNoValue = "window: remove from empty moments"
)
