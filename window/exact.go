package window

import (
	"encoding/json"
	"fmt"
	"math"
	"math/big"
)

// Exact is a sum of float64 values kept without any rounding: adding and
// subtracting are exact, so the sum does not depend on the order of the
// operations, and Value rounds it once, to the nearest double (ties to even).
// It is the "small superaccumulator" of Neal (2015), "Fast exact summation
// using small and large superaccumulators", arXiv:1505.05571: a double
// m·2^e lands, as a 53-bit integer m shifted by e mod 32, in two of 67
// signed 64-bit chunks of 32 bits each; carries are propagated every 1023
// operations, before a chunk could overflow. Infinities and NaNs are counted
// apart, so that subtracting an infinity that was added restores the sum.
//
// An operation costs a few nanoseconds; Value allocates. The zero value is
// an empty sum.
type Exact struct {
	chunk          [exactChunks]int64
	ops            int32
	posInf, negInf int32
	nan            int32
}

const (
	exactChunks = 67 // (2046 exponent positions + 53 bits) / 32, and headroom for carries
	exactCarry  = 1<<10 - 1
)

// Add adds v.
func (s *Exact) Add(v float64) { s.add(v, false) }

// Sub subtracts v.
func (s *Exact) Sub(v float64) { s.add(v, true) }

func (s *Exact) add(v float64, sub bool) {
	b := math.Float64bits(v)
	neg := (b>>63 != 0) != sub
	exp := int(b>>52) & 0x7ff
	mant := b & (1<<52 - 1)
	switch {
	case exp == 0x7ff:
		s.special(mant != 0, neg, sub)
		return
	case exp == 0:
		if mant == 0 {
			return
		}
		exp = 1 // subnormal: m·2^−1074, the same scale as the smallest normal
	default:
		mant |= 1 << 52
	}
	pos := uint(exp - 1) // bit position of m's lowest bit above 2^−1074
	i, sh := pos>>5, pos&31
	lo := int64((mant << sh) & (1<<32 - 1))
	hi := int64(mant >> (32 - sh))
	if neg {
		s.chunk[i] -= lo
		s.chunk[i+1] -= hi
	} else {
		s.chunk[i] += lo
		s.chunk[i+1] += hi
	}
	if s.ops++; s.ops >= exactCarry {
		s.carry()
	}
}

func (s *Exact) special(isNaN, neg, sub bool) {
	d := int32(1)
	if sub {
		d = -1
	}
	switch {
	case isNaN:
		s.nan += d
	case neg != sub: // the value itself was −Inf
		s.negInf += d
	default:
		s.posInf += d
	}
}

// carry brings every chunk but the top one into [0, 2³²), moving the rest up.
func (s *Exact) carry() {
	for i := 0; i < exactChunks-1; i++ {
		c := s.chunk[i] >> 32
		s.chunk[i] -= c << 32
		s.chunk[i+1] += c
	}
	s.ops = 0
}

// AddExact adds the sum o.
func (s *Exact) AddExact(o *Exact) {
	s.carry()
	c := *o
	c.carry()
	for i := range s.chunk {
		s.chunk[i] += c.chunk[i]
	}
	s.posInf += c.posInf
	s.negInf += c.negInf
	s.nan += c.nan
	s.carry()
}

// Reset empties the sum.
func (s *Exact) Reset() { *s = Exact{} }

// Value returns the sum rounded to the nearest double, ties to even; ±Inf
// when it is beyond the doubles' range or holds an infinity, NaN when it
// holds a NaN or infinities of both signs.
func (s *Exact) Value() float64 {
	switch {
	case s.nan != 0 || (s.posInf != 0 && s.negInf != 0):
		return math.NaN()
	case s.posInf != 0:
		return math.Inf(1)
	case s.negInf != 0:
		return math.Inf(-1)
	}
	c := s.chunk
	t := Exact{chunk: c}
	t.carry()
	neg := t.chunk[exactChunks-1] < 0
	if neg {
		for i := range t.chunk {
			t.chunk[i] = -t.chunk[i]
		}
		t.carry()
	}
	words := make([]big.Word, 0, (exactChunks+1)/2*(64/bitsPerWord))
	for i := 0; i < exactChunks; i += 2 {
		w := uint64(t.chunk[i])
		if i+1 < exactChunks {
			w |= uint64(t.chunk[i+1]) << 32
		}
		if bitsPerWord == 64 {
			words = append(words, big.Word(w))
		} else {
			words = append(words, big.Word(uint32(w)), big.Word(w>>32))
		}
	}
	var n big.Int
	n.SetBits(words)
	if n.Sign() == 0 {
		return 0
	}
	var f big.Float
	f.SetInt(&n) // exact: precision follows the integer's length
	f.SetMantExp(&f, -1074)
	v, _ := f.Float64()
	if neg {
		v = -v
	}
	return v
}

const bitsPerWord = 32 << (^uint(0) >> 63)

// exactJSON is Exact's JSON form: its carried chunks (trailing zeros left
// out) and special counts, so that a sum crosses a process boundary exactly.
type exactJSON struct {
	Chunks []int64 `json:"c,omitempty"`
	PosInf int32   `json:"pinf,omitempty"`
	NegInf int32   `json:"ninf,omitempty"`
	NaN    int32   `json:"nan,omitempty"`
}

// MarshalJSON writes the sum exactly.
func (s Exact) MarshalJSON() ([]byte, error) {
	s.carry()
	n := exactChunks
	for n > 0 && s.chunk[n-1] == 0 {
		n--
	}
	return json.Marshal(exactJSON{Chunks: s.chunk[:n], PosInf: s.posInf, NegInf: s.negInf, NaN: s.nan})
}

// UnmarshalJSON reads a sum MarshalJSON wrote.
func (s *Exact) UnmarshalJSON(b []byte) error {
	var j exactJSON
	if err := json.Unmarshal(b, &j); err != nil {
		return err
	}
	if len(j.Chunks) > exactChunks {
		return fmt.Errorf("window: an exact sum of %d chunks, more than %d", len(j.Chunks), exactChunks)
	}
	*s = Exact{posInf: j.PosInf, negInf: j.NegInf, nan: j.NaN}
	for i, c := range j.Chunks {
		if (i < exactChunks-1 && (c < 0 || c >= 1<<32)) || c >= 1<<62 || c <= -1<<62 {
			return fmt.Errorf("window: an exact sum's chunk %d is out of range", i)
		}
		s.chunk[i] = c
	}
	return nil
}
