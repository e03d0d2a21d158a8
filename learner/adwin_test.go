package learner

import (
	"math"
	"math/rand/v2"
	"testing"
)

// The checks of ADWIN are the guarantees of Bifet & Gavaldà (2007),
// "Learning from Time-Changing Data with Adaptive Windowing", SIAM SDM
// (Theorem 3 for ADWIN2, recalled from the paper): on a stationary stream
// the chance of any cut is at most δ; a change of the mean by more than
// 2ε_cut is cut; the histogram holds O(M·log(W/M)) buckets.

// TestADWINKeepsLogarithmicBuckets: 2^20 values of a stationary stream, no
// cut expected: the window holds them all in at most M + 1 buckets per
// level, ⌈log₂(W/M)⌉ + 1 levels.
func TestADWINKeepsLogarithmicBuckets(t *testing.T) {
	a := NewADWIN(0, 0)
	rng := rand.New(rand.NewPCG(5, 5))
	for i := 0; i < 1<<20; i++ {
		a.Add(rng.Float64())
	}
	w := float64(a.Len())
	limit := (DefaultADWINBuckets + 1) * (int(math.Ceil(math.Log2(w/DefaultADWINBuckets))) + 1)
	if a.Buckets() > limit || w < 1<<19 {
		t.Errorf("window of %v values in %d buckets, want at most %d", w, a.Buckets(), limit)
	}
	if math.Abs(a.Mean()-0.5) > 0.01 {
		t.Errorf("the window's mean %.4f, want about 0.5", a.Mean())
	}
}

// TestADWINFalseAlarmsWithinDelta: 300 stationary streams of 3 000 uniform
// values, δ = 0.002: the chance of any cut in a stream is at most δ, so
// more than 3 streams with a cut (binomial tail at p = δ: below 0.3 %)
// would break the guarantee.
func TestADWINFalseAlarmsWithinDelta(t *testing.T) {
	cut := 0
	for s := range 300 {
		a := NewADWIN(0.002, 0)
		rng := rand.New(rand.NewPCG(uint64(s), 77))
		for i := 0; i < 3000; i++ {
			before := a.Len()
			a.Add(rng.Float64())
			if a.Len() <= before {
				cut++
				break
			}
		}
	}
	if cut > 3 {
		t.Errorf("%d of 300 stationary streams were cut, want at most 3 (δ = 0.002)", cut)
	}
}

// TestADWINDetectsAShiftInTime: 2 000 values uniform on [0.1, 0.5] (mean
// 0.3), then uniform on [0.3, 0.7] (mean 0.5): a rise of Δ = 0.2. The
// guarantee: once Δ > 2ε_cut for the split at the change, a cut follows.
// ε_cut is worked out here for n₀ = 2 000 and n₁ new values, with the
// window's variance the mixture's, σ² = 0.4²/12 + p(1−p)Δ² (p = n₁/n), and
// δ' = δ/n — the paper's formula written out — giving the delay n₁* by
// which every seeded stream must have alarmed.
func TestADWINDetectsAShiftInTime(t *testing.T) {
	const n0, delta, shift = 2000.0, 0.002, 0.2
	bound := 0
	for n1 := 1.0; ; n1++ {
		n, p := n0+n1, n1/(n0+n1)
		variance := 0.4*0.4/12 + p*(1-p)*shift*shift
		m := 1 / (1/n0 + 1/n1)
		l := math.Log(2 * n / delta)
		if eps := math.Sqrt(2/m*variance*l) + 2/(3*m)*l; shift > 2*eps {
			bound = int(n1)
			break
		}
	}
	worst := 0
	for s := range 20 {
		a := NewADWIN(delta, 0)
		rng := rand.New(rand.NewPCG(uint64(s), 9))
		for i := 0; i < int(n0); i++ {
			a.Add(0.1 + 0.4*rng.Float64())
		}
		if a.Alarms() > 0 {
			t.Fatalf("seed %d: an alarm before the shift", s)
		}
		delay := 0
		for a.Alarms() == 0 && delay < 10*bound {
			delay++
			a.Add(0.3 + 0.4*rng.Float64())
		}
		worst = max(worst, delay)
		if delay > bound {
			t.Errorf("seed %d: the rise was caught after %d values, the guarantee says by %d", s, delay, bound)
		}
	}
	t.Logf("a rise of %.1f after %.0f values: caught within %d values (guarantee: %d)", shift, n0, worst, bound)
}

// TestADWINInTheEngine: with ADWIN chosen, the engine's drift watch raises
// alarms on the partitioned stream's shift; its state survives encoding to
// the byte (same digest); three engines of two partitions each, merged,
// hold the state of one engine that applied every event; and a published
// copy keeps what it showed while the engine goes on (its detectors are
// copied, not shared).
func TestADWINInTheEngine(t *testing.T) {
	cfg := Config{Drift: DriftConfig{Method: DriftADWIN}}
	evs, pos := partitioned(6000)
	one := mustEngine(t, cfg, partKinds...)
	var parts [3]*Engine
	for i := range parts {
		parts[i] = mustEngine(t, cfg, partKinds...)
	}
	half := len(evs) / 2
	var pub *Engine
	var shown string
	for i, ev := range evs {
		if i == half {
			pub = one.Publish()
			shown = reportJSON(t, pub)
		}
		one.Apply(pos[i], ev)
		parts[pos[i].Partition%3].Apply(pos[i], ev)
	}
	if one.Alarms() == 0 {
		t.Fatal("ADWIN raised no alarm on a stream with a shift")
	}
	if reportJSON(t, pub) != shown {
		t.Error("a published copy changed while the engine went on")
	}
	d := mustEngine(t, cfg, partKinds...)
	if err := d.Decode(one.Encode(nil)); err != nil {
		t.Fatal(err)
	}
	if d.Digest() != one.Digest() || reportJSON(t, d) != reportJSON(t, one) {
		t.Error("decoded, the ADWIN state differs")
	}
	m := parts[0]
	for _, o := range parts[1:] {
		if err := m.Merge(o); err != nil {
			t.Fatal(err)
		}
	}
	if m.Digest() != one.Digest() || reportJSON(t, m) != reportJSON(t, one) {
		t.Error("merged, the engines differ from one engine")
	}
	if mustEngine(t, Config{}, partKinds...).Config().Digest() == one.Config().Digest() {
		t.Error("the configuration digest does not tell the detectors apart")
	}
}
