package window

import "math"

// unitRoundoff is u = 2⁻⁵³, the relative rounding error of one float64
// operation.
const unitRoundoff = 0x1p-53

// Sum is a running sum of float64 values that supports removing a value added
// earlier. It is compensated summation (Neumaier 1974, "Rundungsfehleranalyse
// einiger Verfahren zur Summation endlicher Summen", ZAMM 54:39–51): the
// rounding error of every addition is computed exactly by TwoSum (Knuth, The
// Art of Computer Programming vol. 2, 3rd ed., §4.2.2, Theorem B) and carried
// in a second term, so that the value is hi + lo. A huge value that enters
// and later leaves costs the sum nothing: its contribution cancels exactly in
// hi and its rounding errors are held in lo.
//
// Sum also keeps a bound on |Value − exact sum of the values it holds|: each
// update adds u·|lo| (the only inexact operation is the addition into lo).
// The bound is 0 while every update is exact (integers, or values that share
// a binary exponent range), and it stays tiny unless values of very different
// magnitude pass through; owners of a window compare it with the scale of
// their values and rebuild from the window's contents when it is too large
// (see Moments.Imprecise, and learner's Scorer).
//
// The zero Sum is empty and ready to use. Cost per update: 7 flops.
type Sum struct {
	hi, lo float64
	bound  float64
}

// Add adds v.
func (s *Sum) Add(v float64) {
	t := s.hi + v
	bv := t - s.hi
	err := (s.hi - (t - bv)) + (v - bv)
	s.hi = t
	s.lo += err
	s.bound += unitRoundoff * math.Abs(s.lo)
}

// Sub removes v, which must have been added (with the same bits).
func (s *Sum) Sub(v float64) { s.Add(-v) }

// Value returns the sum, hi + lo rounded once.
func (s *Sum) Value() float64 { return s.hi + s.lo }

// Bound returns a bound on the error of Value beyond its final rounding.
func (s *Sum) Bound() float64 { return s.bound }

// Reset empties the sum.
func (s *Sum) Reset() { *s = Sum{} }

// SumState is the exported form of a Sum, for encoders.
type SumState struct{ Hi, Lo, Bound float64 }

// State returns the fields of s; SetState is its inverse.
func (s *Sum) State() SumState { return SumState{s.hi, s.lo, s.bound} }

// SetState restores a state returned by State.
func (s *Sum) SetState(st SumState) { s.hi, s.lo, s.bound = st.Hi, st.Lo, st.Bound }
