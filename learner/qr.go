package learner

import "math"

// sqrtInfo is the square-root information form of a least-squares problem:
// an upper-triangular R (p×p, row-major) and a vector z with
//
//	RᵀR = A = Σ wᵢ xᵢxᵢᵀ (+ prior),   Rᵀz = b = Σ wᵢ xᵢyᵢ,
//
// so that the coefficients θ solve Rθ = z. Working with R instead of A or
// P = A⁻¹ squares no condition number: on the NIST Longley data the
// covariance-form RLS update loses every digit while this form keeps about
// eleven (see rls_test.go). Rows enter by Givens rotations (Golub & Van Loan,
// Matrix Computations, 4th ed., §5.1.8 and §6.5.3 on updating QR) and leave by
// the LINPACK downdating algorithm dchdd (Dongarra, Bunch, Moler & Stewart,
// LINPACK Users' Guide, SIAM 1979, ch. 10), both O(p²).
type sqrtInfo struct {
	p int
	r []float64 // the upper triangle of R packed by rows: Rᵢⱼ (j ≥ i) at base(i)+j
	z []float64
	s *scratch // a and c are used here
}

// scratch is working space of length p. The learners of one engine share
// theirs (they run on one goroutine, one at a time), so that a key's model
// holds only its state.
type scratch struct{ u, a, c []float64 }

func newScratch(p int) *scratch {
	b := make([]float64, 3*p)
	return &scratch{u: b[:p:p], a: b[p : 2*p : 2*p], c: b[2*p:]}
}

// useScratch returns *sp, first making it when it is nil or of another size.
func useScratch(sp **scratch, p int) *scratch {
	if *sp == nil || len((*sp).u) != p {
		*sp = newScratch(p)
	}
	return *sp
}

// newSqrtInfo returns an empty R and z for p coefficients, and extra more
// floats from the same allocation (a key's model is made on its first event,
// so one allocation instead of several counts at a million keys).
func newSqrtInfo(p int, s *scratch, extra int) (sqrtInfo, []float64) {
	n := p * (p + 1) / 2
	b := make([]float64, n+p+extra)
	return sqrtInfo{p: p, r: b[:n:n], z: b[n : n+p : n+p], s: s}, b[n+p:]
}

// clone returns a copy of q sharing its scratch space, and extra floats
// from the same allocation, as newSqrtInfo.
func (q *sqrtInfo) clone(extra int) (sqrtInfo, []float64) {
	c, more := newSqrtInfo(q.p, q.s, extra)
	copy(c.r, q.r)
	copy(c.z, q.z)
	return c, more
}

// base returns the offset of row i in r less i, so that Rᵢⱼ is r[base(i)+j]:
// row i holds p−i entries from Rᵢᵢ, at i·p − i(i−1)/2.
func (q *sqrtInfo) base(i int) int { return i * (2*q.p - i - 1) / 2 }

func (q *sqrtInfo) reset(diag float64) {
	clear(q.r)
	clear(q.z)
	for i := 0; i < q.p; i++ {
		q.r[q.base(i)+i] = diag
	}
}

// scale multiplies R and z by s: A and b are scaled by s². An entry that
// falls below flushRel of its row's diagonal is set to 0: it can no longer
// change θ by a rounding unit, and without the flush an entry whose exact
// value is 0 (z of a stream the model fits exactly) would decay under
// forgetting into subnormal numbers, which run ten times slower.
func (q *sqrtInfo) scale(s float64) {
	p := q.p
	for i := 0; i < p; i++ {
		row := q.r[q.base(i)+i : q.base(i)+p]
		for j := range row {
			row[j] *= s
		}
		q.z[i] *= s
		tiny := flushRel * math.Abs(row[0])
		for j := 1; j < len(row); j++ {
			if math.Abs(row[j]) < tiny {
				row[j] = 0
			}
		}
		if math.Abs(q.z[i]) < tiny {
			q.z[i] = 0
		}
	}
}

// flushRel is the size relative to its row's diagonal below which scale sets
// an entry of R or z to 0: 2⁻¹²⁰ ≈ 7.5e-37, the square of the unit roundoff
// and then some, far below anything that reaches θ.
const flushRel = 0x1p-120

// add appends the row (x, y): A += xxᵀ, b += x·y. x is not modified.
//
// Rank rule. Where row i of R is still empty (no pivot yet), rotating the
// row's remainder wᵢ in would make |wᵢ| the diagonal Rᵢᵢ. The remainder is
// discarded instead when it is at most rankTol times the norm of column i of
// R with this row included, ‖R[:,i]‖ = √(Aᵢᵢ): the same rule by which solve
// and remove count a diagonal as zero, so add never creates a pivot that the
// solve would drop (and with it the rest of the row, which the rotation would
// have moved into row i). The test is relative to the column's own scale,
// never to the row's: a feature of magnitude 10¹² beside the intercept leaves
// the intercept's 1 intact. A remainder above the rule is always kept.
func (q *sqrtInfo) add(x []float64, y float64) {
	p := q.p
	w := q.s.a
	copy(w, x)
	for i := 0; i < p; i++ {
		wi := w[i]
		ri := q.r[q.base(i) : q.base(i)+p] // entries j ≥ i
		a := ri[i]
		if wi == 0 || a == 0 && q.negligible(i, wi) {
			continue
		}
		// The rotation [c s; −s c] with c = a/h, s = wᵢ/h, h = √(a² + wᵢ²),
		// applied as (a·rᵢⱼ + wᵢ·wⱼ)/h and (a·wⱼ − wᵢ·rᵢⱼ)/h. The remainder's
		// numerators (and z's) are two-term dot products rounded once
		// (dot2), so the remainder keeps its relative accuracy however much
		// cancels and column i is eliminated exactly; R's new row takes one
		// fused multiply-add (dot2 there changed no StRD figure, at a
		// tenth more cost). The one rounding of 1/h scales each whole row
		// alike, which leaves θ unchanged.
		h := math.Sqrt(a*a + wi*wi)
		inv := 1 / h
		ri[i] = dot2(a, a, wi, wi) * inv
		for j := i + 1; j < p; j++ {
			rij, wj := ri[j], w[j]
			ri[j] = math.FMA(a, rij, wi*wj) * inv
			w[j] = dot2(a, wj, -wi, rij) * inv
		}
		zi := q.z[i]
		q.z[i] = dot2(a, zi, wi, y) * inv
		y = dot2(a, y, -wi, zi) * inv
	}
}

// dot2 returns a·b + c·d rounded about once: the product c·d is split
// exactly into its rounded value and its error with a fused multiply-add, an
// error-free transformation (Ogita, Rump & Oishi 2005, "Accurate sum and dot
// product", SIAM J. Sci. Comput. 26(6):1955–1988; the same as Kahan's
// algorithm for a 2×2 determinant). Cost 4 flops.
func dot2(a, b, c, d float64) float64 {
	p := c * d
	e := math.FMA(c, d, -p)
	return math.FMA(a, b, p) + e
}

// negligible reports whether a remainder wi in column i, whose row of R is
// empty, is at most rankTol·√(‖R[0:i, i]‖² + wi²) (see add). Cost O(i); it
// runs only while row i of R has no pivot.
func (q *sqrtInfo) negligible(i int, wi float64) bool {
	col := wi * wi
	for k := 0; k < i; k++ {
		rki := q.r[q.base(k)+i]
		col += rki * rki
	}
	return math.Abs(wi) <= rankTol*math.Sqrt(col)
}

// remove takes the row (x, y) out: A −= xxᵀ, b −= x·y, by dchdd. It returns
// false, leaving R and z unchanged, when the downdated A would not be
// positive definite in floating point; the caller then refactorises.
func (q *sqrtInfo) remove(x []float64, y float64) bool {
	p := q.p
	s, c := q.s.a, q.s.c
	// Solve Rᵀs = x. A column that is, to working precision, a combination
	// of the ones before it (rankTol, as in solve) has a zero row in R: the
	// row being removed has no component along it, so s there is 0 and its
	// rotation is the identity. (One-hot buckets beside an intercept are
	// dependent by construction.)
	var norm2 float64
	for j := 0; j < p; j++ {
		v := x[j]
		var col float64
		for i := 0; i < j; i++ {
			rij := q.r[q.base(i)+j]
			v -= rij * s[i]
			col += rij * rij
		}
		d := q.r[q.base(j)+j]
		if d == 0 || math.Abs(d) <= rankTol*math.Sqrt(col+d*d) {
			s[j] = 0
			continue
		}
		s[j] = v / d
		norm2 += s[j] * s[j]
	}
	// 1 − ‖s‖² is the ratio of the downdated to the current determinant
	// along the leaving row: near 0, the window is about to lose a direction
	// (a category leaves it) and hyperbolic rotations amplify rounding by
	// about 1/(1 − ‖s‖²). Refactorising is then the accurate choice.
	if !(norm2 < 1-downdateMargin) {
		return false
	}
	alpha := math.Sqrt(1 - norm2)
	for i := p - 1; i >= 0; i-- {
		scale := alpha + math.Abs(s[i])
		a, b := alpha/scale, s[i]/scale
		n := math.Sqrt(a*a + b*b)
		c[i], s[i] = a/n, b/n
		alpha = scale * n
	}
	for j := 0; j < p; j++ {
		var xx float64
		for i := j; i >= 0; i-- {
			at := q.base(i) + j
			rij := q.r[at]
			t := c[i]*xx + s[i]*rij
			q.r[at] = c[i]*rij - s[i]*xx
			xx = t
		}
	}
	zeta := y
	for i := 0; i < p; i++ {
		q.z[i] = (q.z[i] - s[i]*zeta) / c[i]
		zeta = c[i]*zeta - s[i]*q.z[i]
	}
	return true
}

// downdateMargin is the smallest 1 − ‖s‖² a downdate accepts; below it the
// caller refactorises (about 4 digits of headroom; see remove).
const downdateMargin = 1e-4

// rankTol is the relative size below which a diagonal of R counts as zero:
// |Rᵢᵢ| ≤ rankTol·‖R[:,i]‖ means column i is, to working precision, a
// combination of the columns before it.
const rankTol = 1e-12

// solve writes θ with Rθ = z into theta by back substitution and returns the
// number of columns found dependent (their coefficient is set to 0, the
// basic solution). Cost O(p²).
func (q *sqrtInfo) solve(theta []float64) (deficient int) {
	p := q.p
	for i := p - 1; i >= 0; i-- {
		d := q.r[q.base(i)+i]
		var col float64
		for k := 0; k <= i; k++ {
			rki := q.r[q.base(k)+i]
			col += rki * rki
		}
		if d == 0 || math.Abs(d) <= rankTol*math.Sqrt(col) {
			theta[i] = 0
			deficient++
			continue
		}
		v := q.z[i]
		for j := i + 1; j < p; j++ {
			v -= q.r[q.base(i)+j] * theta[j]
		}
		theta[i] = v / d
	}
	return deficient
}

func (q *sqrtInfo) encode(w *encoder) {
	w.int(q.p)
	for _, v := range q.r { // row by row from the diagonal, as packed
		w.f64(v)
	}
	for _, v := range q.z {
		w.f64(v)
	}
}

func (q *sqrtInfo) decode(r *decoder) {
	r.expect(q.p, "coefficient count")
	for i := range q.r {
		q.r[i] = r.f64()
	}
	for i := range q.z {
		q.z[i] = r.f64()
	}
}

// expansion maps a feature vector to the regressors of a linear model: an
// optional leading 1, the features, and with degree 2 every product xᵢxⱼ for
// i ≤ j in order (x₀², x₀x₁, …, x₁², …).
type expansion struct {
	d         int
	intercept bool
	degree    int
}

func (e expansion) p() int {
	p := e.d
	if e.intercept {
		p++
	}
	if e.degree == 2 {
		p += e.d * (e.d + 1) / 2
	}
	return p
}

func (e expansion) apply(dst, x []float64) {
	if len(x) != e.d {
		panic(badDim)
	}
	k := 0
	if e.intercept {
		dst[0] = 1
		k = 1
	}
	k += copy(dst[k:], x)
	if e.degree == 2 {
		for i := 0; i < e.d; i++ {
			for j := i; j < e.d; j++ {
				dst[k] = x[i] * x[j]
				k++
			}
		}
	}
}

func dot(a, b []float64) float64 {
	var s float64
	for i, v := range a {
		s += v * b[i]
	}
	return s
}
