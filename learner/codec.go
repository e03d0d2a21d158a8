package learner

import (
	"encoding/binary"
	"fmt"
	"io"
	"math"

	"tidemark/window"
)

// encoder appends a deterministic little-endian encoding: fixed-width
// integers and IEEE-754 bit patterns, length-prefixed strings and slices. No
// map is ever iterated while encoding.
type encoder struct {
	b    []byte
	sink float64 // what reads ahead of the encoder read (touchAhead), kept so that they stay
}

func (w *encoder) u8(v uint8)    { w.b = append(w.b, v) }
func (w *encoder) u32(v uint32)  { w.b = binary.LittleEndian.AppendUint32(w.b, v) }
func (w *encoder) i64(v int64)   { w.b = binary.LittleEndian.AppendUint64(w.b, uint64(v)) }
func (w *encoder) f64(v float64) { w.b = binary.LittleEndian.AppendUint64(w.b, math.Float64bits(v)) }
func (w *encoder) int(v int)     { w.i64(int64(v)) }
func (w *encoder) bool(v bool) {
	if v {
		w.u8(1)
	} else {
		w.u8(0)
	}
}
func (w *encoder) str(s string) { w.u32(uint32(len(s))); w.b = append(w.b, s...) }
func (w *encoder) f64s(v []float64) {
	w.int(len(v))
	for _, x := range v {
		w.f64(x)
	}
}

// decoder reads what encoder wrote, from one slice of bytes or from a
// section handed over in pieces (next). The first failure sticks: later reads
// return zero values and err reports the offset of the first problem, so
// callers check once at the end.
type decoder struct {
	b     []byte // the bytes at hand: all of them, or the current piece
	off   int    // read so far of b
	done  int64  // read so far in all
	total int64  // bytes in all
	next  func() ([]byte, error)
	join  []byte // a read that spans pieces, gathered
	err   error
	ver   uint32 // the state version being read
}

func newDecoder(b []byte) *decoder { return &decoder{b: b, total: int64(len(b))} }

func (r *decoder) fail(what string) {
	if r.err == nil {
		r.err = fmt.Errorf("%w: %s at byte %d", ErrCorruptState, what, r.done)
	}
}

// left returns the bytes not yet read.
func (r *decoder) left() int64 { return r.total - r.done }

func (r *decoder) take(n int) []byte {
	if r.err != nil {
		return nil
	}
	if n < 0 || int64(n) > r.left() {
		r.fail("truncated")
		return nil
	}
	if n <= len(r.b)-r.off {
		p := r.b[r.off : r.off+n]
		r.off += n
		r.done += int64(n)
		return p
	}
	// The read spans pieces: gather it.
	r.join = append(r.join[:0], r.b[r.off:]...)
	for len(r.join) < n {
		p, err := r.next()
		if err != nil || len(p) == 0 {
			if err == nil || err == io.EOF {
				r.fail("truncated")
			} else {
				r.err = err
			}
			return nil
		}
		k := min(n-len(r.join), len(p))
		r.join = append(r.join, p[:k]...)
		r.b, r.off = p, k
	}
	r.done += int64(n)
	return r.join
}

func (r *decoder) u8() uint8 {
	if p := r.take(1); p != nil {
		return p[0]
	}
	return 0
}
func (r *decoder) u32() uint32 {
	if p := r.take(4); p != nil {
		return binary.LittleEndian.Uint32(p)
	}
	return 0
}
func (r *decoder) i64() int64 {
	if p := r.take(8); p != nil {
		return int64(binary.LittleEndian.Uint64(p))
	}
	return 0
}
func (r *decoder) f64() float64 { return math.Float64frombits(uint64(r.i64())) }
func (r *decoder) bool() bool {
	switch r.u8() {
	case 0:
		return false
	case 1:
		return true
	}
	r.fail("bad bool")
	return false
}

// count reads a length and checks it against lo..hi and against the bytes
// left at elem bytes per element, so a corrupt length cannot make a decoder
// allocate more than the input could hold.
func (r *decoder) count(hi int, elem int) int {
	n := r.i64()
	if r.err != nil {
		return 0
	}
	if n < 0 || n > int64(hi) || (elem > 0 && n > r.left()/int64(elem)) {
		r.fail(fmt.Sprintf("length %d out of range", n))
		return 0
	}
	return int(n)
}

func (r *decoder) int() int {
	v := r.i64()
	if v < math.MinInt32 || v > math.MaxInt32<<16 {
		r.fail("integer out of range")
		return 0
	}
	return int(v)
}

func (r *decoder) str(max int) string {
	n := r.u32()
	if int64(n) > int64(max) {
		r.fail("string too long")
		return ""
	}
	return string(r.take(int(n)))
}

func (r *decoder) f64sInto(dst []float64) {
	n := r.count(len(dst), 8)
	if n != len(dst) {
		r.fail("vector length mismatch")
		return
	}
	for i := range dst {
		dst[i] = r.f64()
	}
}

func (r *decoder) expect(v int, what string) {
	if got := r.int(); got != v && r.err == nil {
		r.fail(fmt.Sprintf("%s is %d, want %d", what, got, v))
	}
}

// encodeMoments writes a window.Moments (state version 5 on).
func encodeMoments(w *encoder, m *window.Moments) {
	st := m.State()
	w.i64(st.N)
	w.f64(st.Shift)
	for _, s := range [2]window.SumState{st.S1, st.S2} {
		w.f64(s.Hi)
		w.f64(s.Lo)
		w.f64(s.Bound)
	}
}

// decodeMoments reads what encodeMoments wrote; before state version 5 the
// fields were Welford's n, mean and M2, which the shifted form holds exactly
// (shift = mean, S1 = 0, S2 = M2). Owners rebuild such moments from their
// window, since Welford's removal may have left them inexact.
func decodeMoments(r *decoder, m *window.Moments) {
	var st window.MomentsState
	st.N = r.i64()
	st.Shift = r.f64()
	if r.ver >= 5 {
		st.S1 = window.SumState{Hi: r.f64(), Lo: r.f64(), Bound: r.f64()}
		st.S2 = window.SumState{Hi: r.f64(), Lo: r.f64(), Bound: r.f64()}
	} else {
		st.S2 = window.SumState{Hi: r.f64()}
	}
	if st.N < 0 {
		r.fail("negative count")
	}
	m.SetState(st)
}
