package learner

import (
	"bytes"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"

	"tidemark/bench/synth"
)

// batchRLS solves the closed form DESIGN.md gives for RLS after n events,
//
//	θ = ( Σ λ^(n−i) uᵢuᵢᵀ + λⁿ/p0 · I )⁻¹ Σ λ^(n−i) uᵢyᵢ,
//
// with gonum's mat package (reference library): it forms A and b plainly and
// calls mat.Dense.Solve (LU with partial pivoting).
func batchRLS(t *testing.T, us [][]float64, ys []float64, lambda, p0 float64) []float64 {
	t.Helper()
	n, p := len(us), len(us[0])
	a := mat.NewDense(p, p, nil)
	b := mat.NewVecDense(p, nil)
	for i := range us {
		w := math.Pow(lambda, float64(n-1-i))
		for r := 0; r < p; r++ {
			b.SetVec(r, b.AtVec(r)+w*us[i][r]*ys[i])
			for c := 0; c < p; c++ {
				a.Set(r, c, a.At(r, c)+w*us[i][r]*us[i][c])
			}
		}
	}
	for r := 0; r < p; r++ {
		a.Set(r, r, a.At(r, r)+math.Pow(lambda, float64(n))/p0)
	}
	var theta mat.VecDense
	if err := theta.SolveVec(a, b); err != nil {
		t.Fatalf("gonum solve: %v", err)
	}
	return theta.RawVector().Data
}

// relClose is a relative comparison scaled by the largest magnitude of want.
func relErr(got, want []float64) float64 {
	var scale, worst float64
	for _, w := range want {
		scale = math.Max(scale, math.Abs(w))
	}
	for i := range want {
		worst = math.Max(worst, math.Abs(got[i]-want[i]))
	}
	return worst / math.Max(scale, 1e-300)
}

// Tolerances named by the issue: RLS against the closed form to 1e-9
// relative; sliding-rls against batch least squares to 1e-8 relative.
const (
	rlsTol     = 1e-9
	slidingTol = 1e-8
)

func TestRLSEqualsClosedForm(t *testing.T) {
	for _, lambda := range []float64{1, 0.99, 0.95} {
		for _, d := range []int{1, 3, 8} {
			rng := rand.New(rand.NewPCG(uint64(d), 7))
			spec := RLSConfig{Forget: lambda, P0: 100, Degree: 1}
			m := newRLS(spec, d)
			var us [][]float64
			var ys []float64
			for i := 0; i < 200; i++ {
				x := make([]float64, d)
				for j := range x {
					x[j] = rng.NormFloat64() * float64(j+1)
				}
				y := 3 + rng.NormFloat64()*0.1
				for j, v := range x {
					y += float64(j-1) * v
				}
				m.Learn(x, y, 0)
				us = append(us, append([]float64{1}, x...))
				ys = append(ys, y)
			}
			want := batchRLS(t, us, ys, lambda, 100)
			got := m.Coefficients(nil)
			if e := relErr(got, want); e > rlsTol {
				t.Errorf("forget=%v d=%d: relative error %.3g > %g\n got %v\nwant %v", lambda, d, e, rlsTol, got, want)
			}
		}
	}
}

// TestRLSHalfLifeEqualsClosedForm: with half_life h the per-event factor is
// λᵢ = 0.5^(Δtᵢ/h); for a constant Δt = h/4 that is λ = 0.5^¼ every event,
// so the closed form applies with that λ.
func TestRLSHalfLifeEqualsClosedForm(t *testing.T) {
	const h = int64(4 * 3600e9)
	m := newRLS(RLSConfig{HalfLife: 4 * 3600e9, P0: 10, Degree: 1}, 2)
	rng := rand.New(rand.NewPCG(3, 3))
	var us [][]float64
	var ys []float64
	for i := 0; i < 100; i++ {
		x := []float64{rng.Float64(), rng.NormFloat64()}
		y := 1 + 2*x[0] - x[1] + 0.1*rng.NormFloat64()
		m.Learn(x, y, int64(i)*h/4)
		us = append(us, []float64{1, x[0], x[1]})
		ys = append(ys, y)
	}
	// The first event has no predecessor (λ = 1), so the prior has decayed
	// through 99 factors, not 100: pass p0·λ to line the formula up
	// (λ¹⁰⁰/(p0·λ) = λ⁹⁹/p0).
	lambda := math.Pow(0.5, 0.25)
	want := batchRLS(t, us, ys, lambda, 10*lambda)
	if e := relErr(m.Coefficients(nil), want); e > rlsTol {
		t.Errorf("relative error %.3g > %g", e, rlsTol)
	}
}

// Longley (1967), "An appraisal of least squares programs for the electronic
// computer from the point of view of the user", JASA 62:819–841, as published
// in the NIST Statistical Reference Datasets (StRD) with certified values:
// y, then x1..x6.
var longley = [16][7]float64{
	{60323, 83.0, 234289, 2356, 1590, 107608, 1947},
	{61122, 88.5, 259426, 2325, 1456, 108632, 1948},
	{60171, 88.2, 258054, 3682, 1616, 109773, 1949},
	{61187, 89.5, 284599, 3351, 1650, 110929, 1950},
	{63221, 96.2, 328975, 2099, 3099, 112075, 1951},
	{63639, 98.1, 346999, 1932, 3594, 113270, 1952},
	{64989, 99.0, 365385, 1870, 3547, 115094, 1953},
	{63761, 100.0, 363112, 3578, 3350, 116219, 1954},
	{66019, 101.2, 397469, 2904, 3048, 117388, 1955},
	{67857, 104.6, 419180, 2822, 2857, 118734, 1956},
	{68169, 108.4, 442769, 2936, 2798, 120445, 1957},
	{66513, 110.8, 444546, 4681, 2637, 121950, 1958},
	{68655, 112.6, 482704, 3813, 2552, 123366, 1959},
	{69564, 114.2, 502601, 3931, 2514, 125368, 1960},
	{69331, 115.7, 518173, 4806, 2572, 127852, 1961},
	{70551, 116.9, 554894, 4007, 2827, 130081, 1962},
}

// NIST StRD certified coefficients B0..B6 for Longley.
var longleyCertified = []float64{
	-3482258.63459582, 15.0618722713733, -0.0358191792925910,
	-2.02022980381683, -1.03322686717359, -0.0511041056535807, 1829.15146461355,
}

// lre is NIST's log relative error, −log10(|b − c|/|c|), capped at 15 digits
// for an exact match.
func lre(b, c float64) float64 {
	if b == c {
		return 15
	}
	return -math.Log10(math.Abs(b-c) / math.Abs(c))
}

func TestRLSLongleyLRE(t *testing.T) {
	for _, p0 := range []string{"inf", "1e20"} {
		s, err := ParseSpec("rls:p0=" + p0)
		if err != nil {
			t.Fatal(err)
		}
		m := New(&s, 6).(*RLS)
		for _, row := range longley {
			m.Learn(row[1:], row[0], 0)
		}
		got := m.Coefficients(nil)
		worst := math.Inf(1)
		for i, c := range longleyCertified {
			l := lre(got[i], c)
			worst = math.Min(worst, l)
			if l < 9 {
				t.Errorf("p0=%s B%d = %.15g, certified %.15g: LRE %.2f < 9", p0, i, got[i], c, l)
			}
		}
		t.Logf("p0=%s: Longley minimum LRE over B0..B6 = %.2f", p0, worst)
	}
}

// TestCovarianceFormLosesLongley documents why RLS is not the textbook
// recursion: the covariance-form update, written plainly here, fed the same
// rows from P(0) = 1e20·I, ends far from the certified values.
func TestCovarianceFormLosesLongley(t *testing.T) {
	const p = 7
	P := mat.NewDense(p, p, nil)
	for i := 0; i < p; i++ {
		P.Set(i, i, 1e20)
	}
	theta := mat.NewVecDense(p, nil)
	for _, row := range longley {
		u := mat.NewVecDense(p, append([]float64{1}, row[1:]...))
		var pu mat.VecDense
		pu.MulVec(P, u)
		den := 1 + mat.Dot(u, &pu)
		e := row[0] - mat.Dot(u, theta)
		theta.AddScaledVec(theta, e/den, &pu)
		var outer mat.Dense
		outer.Outer(1/den, &pu, &pu)
		P.Sub(P, &outer)
	}
	worst := math.Inf(1)
	for i, c := range longleyCertified {
		worst = math.Min(worst, lre(theta.AtVec(i), c))
	}
	t.Logf("covariance form: Longley minimum LRE = %.2f", worst)
	if worst > 3 {
		t.Errorf("covariance form reached LRE %.2f; the stability argument in rls.go would be moot", worst)
	}
}

// batchLS is ordinary least squares with gonum (reference library):
// mat.Dense.Solve on the tall system, which uses QR for a non-square matrix.
func batchLS(t *testing.T, us [][]float64, ys []float64) []float64 {
	t.Helper()
	n, p := len(us), len(us[0])
	x := mat.NewDense(n, p, nil)
	for i, u := range us {
		x.SetRow(i, u)
	}
	var theta mat.Dense
	if err := theta.Solve(x, mat.NewDense(n, 1, append([]float64(nil), ys...))); err != nil {
		t.Fatalf("gonum least squares: %v", err)
	}
	return mat.Col(nil, 0, &theta)
}

func TestSlidingRLSMatchesBatchAfterMillionEvents(t *testing.T) {
	n := 1_000_000
	if testing.Short() {
		n = 100_000
	}
	const w, d = 200, 3
	m := newSliding(SlidingConfig{Window: Window{Count: w}, Degree: 1, Max: DefaultMemoryCap}, d)
	rng := rand.New(rand.NewPCG(11, 12))
	var us [][]float64
	var ys []float64
	x := make([]float64, d)
	for i := 0; i < n; i++ {
		// The relationship drifts slowly, so every window has a different fit
		// and the downdates do real work; features have mixed scales.
		phase := float64(i) / 5000
		for j := range x {
			x[j] = rng.NormFloat64()*math.Pow(10, float64(j)) + 5
		}
		y := 10 + math.Sin(phase)*x[0] + math.Cos(phase)*x[1]/10 + 0.001*x[2] + rng.NormFloat64()
		m.Learn(x, y, 0)
		if i >= n-w {
			us = append(us, append([]float64{1}, x...))
			ys = append(ys, y)
		}
	}
	want := batchLS(t, us, ys)
	got := m.Coefficients(nil)
	for i := range want {
		if e := math.Abs(got[i]-want[i]) / math.Max(math.Abs(want[i]), 1e-12); e > slidingTol {
			t.Errorf("θ%d = %.15g, gonum %.15g: relative error %.3g > %g", i, got[i], want[i], e, slidingTol)
		}
	}
	t.Logf("%d events, %d refactorisations", n, m.Refactorisations())
}

func TestSlidingRLSTimeWindowMatchesBatch(t *testing.T) {
	const hour = int64(3600e9)
	s, err := ParseSpec("sliding-rls:window=6h")
	if err != nil {
		t.Fatal(err)
	}
	m := New(&s, 2).(*SlidingRLS)
	rng := rand.New(rand.NewPCG(5, 6))
	type row struct {
		u []float64
		y float64
		t int64
	}
	var all []row
	tm := int64(0)
	for i := 0; i < 5000; i++ {
		tm += hour / 12 * int64(1+rng.IntN(3)) // 5 to 15 minutes apart
		x := []float64{rng.NormFloat64(), rng.Float64() * 100}
		y := float64(i%7) + x[0] - 0.01*x[1] + rng.NormFloat64()
		m.Advance(tm)
		m.Learn(x, y, tm)
		all = append(all, row{append([]float64{1}, x...), y, tm})
	}
	var us [][]float64
	var ys []float64
	for _, r := range all {
		if r.t >= tm-6*hour {
			us = append(us, r.u)
			ys = append(ys, r.y)
		}
	}
	if m.w.len() != len(us) {
		t.Fatalf("window holds %d rows, want %d (those within 6h of the newest)", m.w.len(), len(us))
	}
	if e := relErr(m.Coefficients(nil), batchLS(t, us, ys)); e > slidingTol {
		t.Errorf("relative error %.3g > %g", e, slidingTol)
	}
}

func TestRLSDegreeTwoFitsQuadratic(t *testing.T) {
	// y = 1 + 2a − b + 0.5a² + 3ab − b², exactly; regressors [1, a, b, a², ab, b²].
	s, _ := ParseSpec("rls:degree=2,p0=inf")
	m := New(&s, 2).(*RLS)
	rng := rand.New(rand.NewPCG(1, 1))
	for i := 0; i < 50; i++ {
		a, b := rng.NormFloat64(), rng.NormFloat64()
		m.Learn([]float64{a, b}, 1+2*a-b+0.5*a*a+3*a*b-b*b, 0)
	}
	want := []float64{1, 2, -1, 0.5, 3, -1}
	if e := relErr(m.Coefficients(nil), want); e > 1e-12 {
		t.Errorf("coefficients %v, want %v", m.Coefficients(nil), want)
	}
}

// TestSlidingRLSDependentColumns: one-hot buckets beside an intercept make
// the design rank-deficient by construction. The coefficients are then not
// unique, but the fitted values are: sliding-rls must predict what gonum's
// least squares predicts on the same window with the redundant column dropped.
func TestSlidingRLSDependentColumns(t *testing.T) {
	const w = 150
	m := newSliding(SlidingConfig{Window: Window{Count: w}, Degree: 1, Max: DefaultMemoryCap}, 5)
	rng := rand.New(rand.NewPCG(8, 8))
	type row struct {
		x []float64
		y float64
	}
	var all []row
	for i := 0; i < 20000; i++ {
		cat := rng.IntN(3)
		x := []float64{rng.NormFloat64(), rng.Float64() * 10, 0, 0, 0}
		x[2+cat] = 1
		y := 2 + x[0] - 0.3*x[1] + []float64{0, 4, -2}[cat] + 0.5*rng.NormFloat64() + math.Sin(float64(i)/700)*x[0]
		m.Learn(x, y, 0)
		all = append(all, row{x, y})
	}
	var us [][]float64
	var ys []float64
	for _, r := range all[len(all)-w:] {
		us = append(us, []float64{1, r.x[0], r.x[1], r.x[2], r.x[3]}) // the third bucket is 1 − the others
		ys = append(ys, r.y)
	}
	theta := batchLS(t, us, ys)
	for _, q := range [][]float64{{0.5, 3, 1, 0, 0}, {-1, 7, 0, 1, 0}, {2, 0.5, 0, 0, 1}} {
		got, ok := m.Predict(q)
		want := theta[0] + theta[1]*q[0] + theta[2]*q[1] + theta[3]*q[2] + theta[4]*q[3]
		if !ok || math.Abs(got-want) > slidingTol*math.Max(1, math.Abs(want)) {
			t.Errorf("predict(%v) = %.12g, gonum least squares %.12g", q, got, want)
		}
	}
	if m.Deficient() != 1 {
		t.Errorf("%d dependent columns reported, want 1", m.Deficient())
	}
	t.Logf("20000 events, %d refactorisations", m.Refactorisations())
}

// TestSlidingRLSOnScenarioMatchesMinimumNorm: on the demo scenario's room-b
// (hour and weekday features, and a categorical whose values may all hash
// into one bucket, a copy of the intercept), sliding-rls predicts what the
// minimum-norm least-squares fit of the window predicts, computed with
// gonum's SVD (rank by relative singular value 1e-9).
func TestSlidingRLSOnScenarioMatchesMinimumNorm(t *testing.T) {
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: 10, Seed: 1})
	sp, _ := ParseSpec("sliding-rls:window=864")
	var schema *Schema
	var m *SlidingRLS
	var ev Event
	var us [][]float64
	var ys []float64
	n := 0
	for _, line := range bytes.Split(buf.Bytes(), []byte("\n")) {
		if DecodeEvent(line, &ev) != nil || ev.Key != "room-b" {
			continue
		}
		if schema == nil {
			schema = SchemaOf(&ev, FeatureConfig{HashBuckets: 4, TimeFeatures: true})
			m = New(&sp, schema.Dim()).(*SlidingRLS)
		}
		x := make([]float64, schema.Dim())
		schema.Vector(x, &ev)
		u := append([]float64{1}, x...)
		if n >= 864 && n%211 == 0 {
			got, _ := m.Predict(x)
			X := mat.NewDense(864, len(u), nil)
			for i, r := range us[len(us)-864:] {
				X.SetRow(i, r)
			}
			var svd mat.SVD
			svd.Factorize(X, mat.SVDThin)
			vals := svd.Values(nil)
			rank := 0
			for _, v := range vals {
				if v > 1e-9*vals[0] {
					rank++
				}
			}
			var theta mat.Dense
			svd.SolveTo(&theta, mat.NewDense(864, 1, append([]float64(nil), ys[len(ys)-864:]...)), rank)
			var want float64
			for j := range u {
				want += u[j] * theta.At(j, 0)
			}
			if math.Abs(got-want) > slidingTol*math.Max(1, math.Abs(want)) {
				t.Errorf("event %d: sliding-rls predicts %.12g, minimum-norm least squares (rank %d) %.12g", n, got, rank, want)
			}
		}
		m.Learn(x, ev.Target, ev.Time)
		us, ys = append(us, u), append(ys, ev.Target)
		n++
	}
}

// TestRankRuleUsesColumnScale is the regression test for issue 10's first
// defect: with no prior, a feature of magnitude ~10¹² beside the intercept
// made the intercept's 1 look like rounding noise relative to the row's
// norm, so the intercept was never fitted (prequential MAE ≈ 31 where least
// squares gives ≈ 0.09). Rows y = 100 + 1e-10·bytes + 2·alpha + N(0, 0.1²);
// the reference is gonum's least squares (QR) on the same rows.
func TestRankRuleUsesColumnScale(t *testing.T) {
	rng := rand.New(rand.NewPCG(10, 1))
	const n = 3000
	var us [][]float64
	var ys []float64
	for i := 0; i < n; i++ {
		bytes := 1e12 * (1 + rng.Float64())
		alpha := rng.NormFloat64()
		us = append(us, []float64{1, alpha, bytes}) // features in name order: alpha, bytes
		ys = append(ys, 100+1e-10*bytes+2*alpha+0.1*rng.NormFloat64())
	}
	for _, spec := range []string{"rls:p0=inf", "sliding-rls:window=5000"} {
		s, err := ParseSpec(spec)
		if err != nil {
			t.Fatal(err)
		}
		m := New(&s, 2)
		var sumAbs float64
		scored := 0
		for i, u := range us {
			if p, ok := m.Predict(u[1:]); ok && i >= 100 {
				sumAbs += math.Abs(ys[i] - p)
				scored++
			}
			m.Learn(u[1:], ys[i], 0)
		}
		want := batchLS(t, us, ys)
		got := m.(Coefficients).Coefficients(nil)
		// Compared per coefficient, each relative to itself: the intercept is
		// 100, the bytes coefficient 1e-10.
		for i := range want {
			if e := math.Abs(got[i]-want[i]) / math.Abs(want[i]); !(e < 1e-6) {
				t.Errorf("%s: coefficient %d = %.10g, least squares %.10g (relative error %.2g)", spec, i, got[i], want[i], e)
			}
		}
		// Noise N(0, 0.1²) has mean absolute value 0.1·√(2/π) ≈ 0.08.
		if mae := sumAbs / float64(scored); !(mae < 0.1) {
			t.Errorf("%s: prequential MAE %.3g after the first 100 events, want about 0.08", spec, mae)
		}
	}
}
