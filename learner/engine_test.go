package learner

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"runtime"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
)

func mustEngine(t testing.TB, cfg Config, specs ...string) *Engine {
	t.Helper()
	for _, s := range specs {
		sp, err := ParseSpec(s)
		if err != nil {
			t.Fatal(err)
		}
		cfg.Learners = append(cfg.Learners, sp)
	}
	e, err := NewEngine(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return e
}

func ev(key string, tm int64, y float64, x ...float64) *Event {
	e := &Event{Key: key, Time: tm, HasTime: tm != 0, Target: y}
	for i, v := range x {
		e.Features = append(e.Features, Feature{Name: fmt.Sprintf("x%d", i), Num: v})
	}
	return e
}

// TestEngineMeanWindowByHand: mean:window=3 on targets 1..6, per key, by hand.
// Predictions before training: –, 1, 1.5, 2, 3, 4; errors 1, 1.5, 2, 2, 2;
// MAE = 8.5/5 = 1.7, RMSE = √(15.25/5), bias 1.7 (all errors positive).
// Key "b" gets the same targets interleaved, so its metrics are the same and
// the overall ones too (each error twice).
func TestEngineMeanWindowByHand(t *testing.T) {
	e := mustEngine(t, Config{}, "mean:window=3")
	off := int64(0)
	for y := 1.0; y <= 6; y++ {
		for _, k := range []string{"a", "b"} {
			off++
			if ok, err := e.Apply(Position{0, off}, ev(k, 0, y, 0)); !ok || err != nil {
				t.Fatal(ok, err)
			}
		}
	}
	r := e.Report(true)
	l := r.Learners[0]
	if l.Scored != 10 || l.Unscored != 2 || math.Abs(*l.MAE-1.7) > handTol || math.Abs(*l.RMSE-math.Sqrt(3.05)) > handTol || math.Abs(*l.Bias-1.7) > handTol {
		t.Errorf("overall %+v mae %v rmse %v", l.Metrics, *l.MAE, *l.RMSE)
	}
	for _, k := range l.Keys {
		if k.Scored != 5 || math.Abs(*k.MAE-1.7) > handTol {
			t.Errorf("key %s: scored %d mae %v", k.Key, k.Scored, *k.MAE)
		}
	}
}

func TestEngineDuplicatesAndRejections(t *testing.T) {
	e := mustEngine(t, Config{MaxKeys: 2}, "mean", "rls:half_life=1h")
	if _, err := e.Apply(Position{0, 1}, ev("a", 1e9, 1, 0)); err != nil {
		t.Fatal(err)
	}
	if ok, err := e.Apply(Position{0, 1}, ev("a", 2e9, 1, 0)); ok || err != nil {
		t.Errorf("redelivered position: applied %v err %v, want ignored", ok, err)
	}
	if _, err := e.Apply(Position{0, 2}, ev("b", 0, 1, 0)); !errors.Is(err, ErrRejected) {
		t.Errorf("no time with half_life: %v, want ErrRejected", err)
	}
	if _, err := e.Apply(Position{0, 3}, ev("b", 3e9, 1, 0)); err != nil {
		t.Fatal(err)
	}
	_, err := e.Apply(Position{0, 4}, ev("c", 4e9, 1, 0))
	if !errors.Is(err, ErrRejected) {
		t.Errorf("third key past cap 2: %v, want ErrRejected", err)
	}
	if _, err := e.Apply(Position{0, 5}, ev("a", 5e9, 1)); !errors.Is(err, ErrRejected) {
		t.Errorf("missing feature: %v, want ErrRejected", err)
	}
	e.Skip(Position{1, 0})
	r := e.Report(false)
	if r.Events != 2 || r.Rejected != 4 || r.Duplicates != 1 || r.Keys != 2 {
		t.Errorf("report %+v", r)
	}
	if !e.Covers(Position{0, 5}) || e.Covers(Position{0, 6}) || !e.Covers(Position{1, 0}) {
		t.Errorf("positions %v", e.Positions())
	}
}

// stream returns a keyed stream with numeric and categorical features.
func stream(n int, seed uint64) []*Event {
	rng := rand.New(rand.NewPCG(seed, 1))
	var out []*Event
	tm := int64(1_700_000_000e9)
	for i := 0; i < n; i++ {
		tm += int64(rng.IntN(600)+1) * 1e9
		a, b := rng.NormFloat64(), rng.Float64()*10
		shift := []string{"day", "night", "late"}[rng.IntN(3)]
		key := []string{"north", "south", "east"}[i%3]
		y := 3*a - b + rng.NormFloat64()
		if i > n/2 {
			y += 5 * a
		}
		out = append(out, &Event{Key: key, Time: tm, HasTime: true, Target: y, Features: []Feature{
			{Name: "a", Num: a}, {Name: "b", Num: b}, {Name: "shift", Str: shift, IsStr: true}}})
	}
	return out
}

var allKinds = []string{
	"knn:k=5,window=200", "knn:k=3,window=6h,weight=inverse", "rls:forget=0.99",
	"rls:half_life=12h,degree=2", "sliding-rls:window=100", "sliding-rls:window=3h", "mean", "mean:window=50",
}

func TestEngineEncodeDecodeRoundTrip(t *testing.T) {
	events := stream(3000, 4)
	a := mustEngine(t, Config{Features: FeatureConfig{HashBuckets: 4, TimeFeatures: true}}, allKinds...)
	b := mustEngine(t, Config{Features: FeatureConfig{HashBuckets: 4, TimeFeatures: true}}, allKinds...)
	for i, ev := range events[:1500] {
		a.Apply(Position{0, int64(i)}, ev)
	}
	state := a.Encode(nil)
	if err := b.Decode(state); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(b.Encode(nil), state) {
		t.Fatal("decode then encode changed the bytes")
	}
	for i, ev := range events[1500:] {
		a.Apply(Position{0, int64(1500 + i)}, ev)
		b.Apply(Position{0, int64(1500 + i)}, ev)
	}
	if a.Digest() != b.Digest() {
		t.Error("engines diverged after a round trip")
	}
	ra, rb := a.Report(true), b.Report(true)
	if ja, jb := mustJSON(t, ra), mustJSON(t, rb); ja != jb {
		t.Error("reports differ after a round trip")
	}
	for _, l := range ra.Learners {
		if l.Scored == 0 {
			t.Errorf("%s scored nothing", l.Name)
		}
	}
}

func TestEngineDecodeRefusesOtherConfig(t *testing.T) {
	a := mustEngine(t, Config{}, "rls", "mean")
	a.Apply(Position{0, 1}, ev("", 0, 1, 2))
	b := mustEngine(t, Config{}, "rls:forget=0.9", "mean")
	if err := b.Decode(a.Encode(nil)); !errors.Is(err, ErrInvalidSpec) {
		t.Errorf("decode under other specs: %v, want ErrInvalidSpec", err)
	}
}

// TestEngineDecodeTruncated: every truncation of a small state is an error,
// never a panic.
func TestEngineDecodeTruncated(t *testing.T) {
	small := []string{"knn:k=3,window=10", "knn:window=1h", "rls:half_life=1h", "sliding-rls:window=10", "mean:window=5", "mean"}
	cfg := Config{Features: FeatureConfig{HashBuckets: 2}, Score: ScoreConfig{Recent: 4}}
	a := mustEngine(t, cfg, small...)
	for i, ev := range stream(40, 9) {
		a.Apply(Position{0, int64(i)}, ev)
	}
	state := a.Encode(nil)
	b := mustEngine(t, cfg, small...)
	for n := 0; n < len(state); n++ {
		if err := b.Decode(state[:n]); err == nil {
			t.Fatalf("truncated to %d of %d bytes: decoded without error", n, len(state))
		}
	}
}

// TestHotPathAllocatesNothing: once a key's learners exist, Apply (predict,
// score, train) allocates nothing, for every kind.
func TestHotPathAllocatesNothing(t *testing.T) {
	for _, spec := range allKinds {
		e := mustEngine(t, Config{Features: FeatureConfig{HashBuckets: 4}}, spec)
		events := stream(4000, 2)
		for i, ev := range events[:3000] {
			e.Apply(Position{0, int64(i)}, ev)
		}
		i := 3000
		allocs := testing.AllocsPerRun(500, func() {
			e.Apply(Position{0, int64(i)}, events[i])
			i++
		})
		if allocs != 0 {
			t.Errorf("%s: %v allocations per event, want 0", spec, allocs)
		}
	}
}

func ExampleEngine() {
	spec, _ := ParseSpec("rls:p0=inf")
	e, _ := NewEngine(Config{Learners: []Spec{spec}})
	// y = 2 + 3x, exactly: RLS finds it after two events.
	for i, x := range []float64{0, 1, 2, 3} {
		ev := &Event{Target: 2 + 3*x, Features: []Feature{{Name: "x", Num: x}}}
		e.Apply(Position{Offset: int64(i)}, ev)
	}
	p, _ := e.Predict("", "rls:p0=inf", &Event{Features: []Feature{{Name: "x", Num: 10}}})
	r := e.Report(false)
	// The MAE is rounding error only (y is exact in the coefficients, not in
	// the last bit of binary arithmetic), so print it to 9 decimals.
	fmt.Printf("predict(10) = %.6g after %d events; scored %d, mae %.9f\n", p.Value, p.Trained, r.Learners[0].Scored, *r.Learners[0].MAE)
	// Output: predict(10) = 32 after 4 events; scored 2, mae 0.000000000
}

func mustJSON(t *testing.T, v any) string {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// TestEngineSectionsRestoreOnePartition: the state of one partition decodes
// without the others, and its keys predict as before.
func TestEngineSectionsRestoreOnePartition(t *testing.T) {
	cfg := Config{Features: FeatureConfig{HashBuckets: 2}}
	a := mustEngine(t, cfg, "rls:forget=0.99", "knn:k=3,window=50")
	for i, ev := range stream(600, 8) {
		part := int32(i % 3) // keys north, south, east land in partitions 0, 1, 2
		a.Apply(Position{part, int64(i)}, ev)
	}
	secs := a.Sections()
	if len(secs) != 4 || !secs[0].Global || secs[2].Partition != 1 {
		t.Fatalf("sections %d, want global + 3 partitions", len(secs))
	}
	b := mustEngine(t, cfg, "rls:forget=0.99", "knn:k=3,window=50")
	if err := b.DecodeSections([]Section{secs[0], secs[2]}); err != nil {
		t.Fatal(err)
	}
	q := &Event{Features: []Feature{{Name: "a", Num: 0.5}, {Name: "b", Num: 3}, {Name: "shift", Str: "day", IsStr: true}}}
	for _, l := range []string{"rls:forget=0.99", "knn:k=3,window=50"} {
		ya, err1 := a.Predict("south", l, q)
		yb, err2 := b.Predict("south", l, q)
		if err1 != nil || err2 != nil || ya.Value != yb.Value {
			t.Errorf("%s: partition-only restore predicts %v (%v), full %v (%v)", l, yb, err2, ya, err1)
		}
	}
	if _, err := b.Predict("north", "rls:forget=0.99", q); !errors.Is(err, ErrUnknownKey) {
		t.Errorf("key of an unrestored partition: %v, want ErrUnknownKey", err)
	}
	if a.Config().Digest() != b.Config().Digest() {
		t.Error("same configuration, different digests")
	}
	c := mustEngine(t, cfg, "rls:forget=0.98", "knn:k=3,window=50")
	if c.Config().Digest() == a.Config().Digest() {
		t.Error("different configurations, same digest")
	}
}

// TestStateIndependentOfPartitionInterleaving: the same events per partition,
// interleaved two ways (as a consumer of several partitions may see them),
// give the same state digest and the same report.
func TestStateIndependentOfPartitionInterleaving(t *testing.T) {
	events := stream(1500, 12)
	type item struct {
		pos Position
		ev  *Event
	}
	parts := map[int32][]item{}
	for i, ev := range events {
		p := int32(i % 3) // key i%3 lives in partition i%3
		parts[p] = append(parts[p], item{Position{p, int64(len(parts[p]))}, ev})
	}
	a := mustEngine(t, Config{}, allKinds...)
	b := mustEngine(t, Config{}, allKinds...)
	// a: round robin; b: partition 2 first, then 0 and 1 in bursts of 7.
	for i := 0; i < 500; i++ {
		for p := int32(0); p < 3; p++ {
			a.Apply(parts[p][i].pos, parts[p][i].ev)
		}
	}
	for _, it := range parts[2] {
		b.Apply(it.pos, it.ev)
	}
	for i := 0; i < 500; i += 7 {
		for _, p := range []int32{1, 0} {
			for _, it := range parts[p][i:min(i+7, 500)] {
				b.Apply(it.pos, it.ev)
			}
		}
	}
	if a.Digest() != b.Digest() {
		t.Error("digests differ between two interleavings of the same partitions")
	}
	if ja, jb := mustJSON(t, a.Report(true)), mustJSON(t, b.Report(true)); ja != jb {
		t.Error("reports differ between two interleavings of the same partitions")
	}
}

// TestMemoryFollowsData: a key's count window holds what it has seen, not
// what it could hold. 10 000 keys of knn:k=10,window=1000 with one event
// each (issue 13's case: 4.9 GB in the service before) must stay far below
// the 100 MB the issue allows; our bound is 4 KB a key (measured 1.35 KB,
// against 42 KB when the window was allocated in full).
func TestMemoryFollowsData(t *testing.T) {
	keys := make([]string, 10_000)
	for i := range keys {
		keys[i] = fmt.Sprintf("key-%05d", i)
	}
	runtime.GC()
	var before, after runtime.MemStats
	runtime.ReadMemStats(&before)
	e := mustEngine(t, Config{MaxKeys: 20_000}, "knn:k=10,window=1000")
	for i, k := range keys {
		e.Apply(Position{Offset: int64(i)}, &Event{Key: k, Target: 1, Features: []Feature{{Name: "a", Num: 1}, {Name: "b", Num: 2}, {Name: "c", Num: 3}}})
	}
	runtime.GC()
	runtime.ReadMemStats(&after)
	perKey := (int64(after.HeapAlloc) - int64(before.HeapAlloc)) / int64(len(keys))
	t.Logf("10 000 keys of knn:k=10,window=1000, one event each: %d bytes a key", perKey)
	if perKey > 4<<10 {
		t.Errorf("%d bytes a key with one event each, more than 4 KB", perKey)
	}
	runtime.KeepAlive(e)
}

// TestBytesPerKey measures what a key costs with two events (issue 13's
// million-key case: 2 M events over 10⁶ keys), d = 8, for each learner kind
// alone and for rls + mean together, the engine's own per-key bookkeeping
// (scorer, drift detector, map entry) included. The README's figures come
// from its log. Bounds: twice what was measured, so that only a real
// regression fails (an rls + mean key took 2.6 KB before the packed R, the
// shared scratch space and the grown-on-demand score window).
func TestBytesPerKey(t *testing.T) {
	cases := []struct {
		specs []string
		bound int64
	}{
		{[]string{"rls:forget=0.99"}, 2300},
		{[]string{"mean:window=100"}, 1500},
		{[]string{"knn:k=10,window=1000"}, 3600},
		{[]string{"sliding-rls:window=500"}, 3300},
		{[]string{"rls:forget=0.99", "mean:window=100"}, 3600},
	}
	keys := make([]string, 50_000)
	for i := range keys {
		keys[i] = fmt.Sprintf("meter-%06d", i)
	}
	fs := make([]Feature, 8)
	for j := range fs {
		fs[j].Name = fmt.Sprint("x", j)
	}
	for _, c := range cases {
		runtime.GC()
		var before, after runtime.MemStats
		runtime.ReadMemStats(&before)
		e := mustEngine(t, Config{MaxKeys: 100_000}, c.specs...)
		for rep := 0; rep < 2; rep++ {
			for i, k := range keys {
				for j := range fs {
					fs[j].Num = float64(i*j%7) + float64(rep)
				}
				e.Apply(Position{Offset: int64(rep*len(keys) + i)}, &Event{Key: k, Target: 1, Time: int64(rep*len(keys)+i) * 1e9, HasTime: true, Features: fs})
			}
		}
		runtime.GC()
		runtime.ReadMemStats(&after)
		perKey := (int64(after.HeapAlloc) - int64(before.HeapAlloc)) / int64(len(keys))
		estimate := e.StateBytes() / int64(len(keys))
		t.Logf("%s: %d bytes a key (two events, d = 8); estimated %d", strings.Join(c.specs, " + "), perKey, estimate)
		// The memory budget's estimate counts what is held, not the
		// allocations' rounding and doubling: it should be near.
		if r := float64(perKey) / float64(estimate); r < 0.8 || r > 1.6 {
			t.Errorf("%s: the estimate %d is %.2f of the %d measured", strings.Join(c.specs, " + "), estimate, 1/r, perKey)
		}
		if perKey > c.bound {
			t.Errorf("%s: %d bytes a key, bound %d", strings.Join(c.specs, " + "), perKey, c.bound)
		}
		runtime.KeepAlive(e)
	}
}

// TestPredictConcurrent: Engine.Predict keeps scratch space of its own, so
// many goroutines may predict at once from an engine nobody changes (the
// service's published copy) and each gets what a lone caller gets. Run
// under -race in CI.
func TestPredictConcurrent(t *testing.T) {
	cfg := Config{Features: FeatureConfig{HashBuckets: 2}}
	e := mustEngine(t, cfg, "knn:k=5,window=200", "knn:k=3,window=50,weight=inverse", "rls:forget=0.99", "sliding-rls:window=100", "mean:window=50")
	for i, ev := range stream(900, 4) {
		e.Apply(Position{Offset: int64(i)}, ev)
	}
	rows := stream(40, 5)
	names := []string{"knn:k=5,window=200", "knn:k=3,window=50,weight=inverse", "rls:forget=0.99", "sliding-rls:window=100", "mean:window=50"}
	want := map[string]float64{}
	for i, r := range rows {
		for _, n := range names {
			p, err := e.Predict(r.Key, n, r)
			if err != nil {
				t.Fatal(err)
			}
			want[fmt.Sprint(i, n)] = p.Value
		}
	}
	var wg sync.WaitGroup
	for g := 0; g < 8; g++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for rep := 0; rep < 20; rep++ {
				for i, r := range rows {
					n := names[(i+g+rep)%len(names)]
					if p, err := e.Predict(r.Key, n, r); err != nil || p.Value != want[fmt.Sprint(i, n)] {
						t.Errorf("goroutine %d: row %d %s: %v (%v), alone %v", g, i, n, p.Value, err, want[fmt.Sprint(i, n)])
						return
					}
				}
			}
		}()
	}
	wg.Wait()
}

// manyKeys is a stream over n keys (key i mod n), two features.
func manyKeys(events, n int, seed uint64) []*Event {
	rng := rand.New(rand.NewPCG(seed, 3))
	out := make([]*Event, events)
	tm := int64(1_700_000_000e9)
	for i := range out {
		tm += 60e9
		a, b := rng.NormFloat64(), rng.NormFloat64()
		out[i] = &Event{Key: fmt.Sprintf("room-%04d", rng.IntN(n)), Time: tm, HasTime: true, Target: 2*a - b + 0.1*rng.NormFloat64(),
			Features: []Feature{{Name: "a", Num: a}, {Name: "b", Num: b}}}
	}
	return out
}

// TestPublishedEngineDoesNotChange: a published copy shows the engine as it
// was when published, however many events the engine applies afterwards
// (its keys are copied before they change), and publishing changes nothing
// in what the engine computes: the same events with and without publishes
// in between give the same state bytes and reports.
func TestPublishedEngineDoesNotChange(t *testing.T) {
	specs := []string{"knn:k=3,window=50", "rls:forget=0.99", "sliding-rls:window=30", "mean:window=20"}
	events := manyKeys(6000, 200, 8)
	a := mustEngine(t, Config{}, specs...)
	b := mustEngine(t, Config{}, specs...)
	type seen struct {
		view   *Engine
		state  []byte
		report string
		pred   map[string]float64
	}
	var views []seen
	probe := events[:20]
	for i, ev := range events {
		pos := Position{Partition: int32(i % 3), Offset: int64(i)}
		a.Apply(pos, ev)
		b.Apply(pos, ev)
		if i%97 == 0 || i == 3000 {
			v := a.Publish()
			s := seen{view: v, state: a.Encode(nil), report: mustJSON(t, a.Report(true)), pred: map[string]float64{}}
			for j, r := range probe {
				if p, err := a.Predict(r.Key, "rls:forget=0.99", r); err == nil {
					s.pred[fmt.Sprint(j)] = p.Value
				}
			}
			views = append(views, s)
		}
	}
	if !bytes.Equal(a.Encode(nil), b.Encode(nil)) || mustJSON(t, a.Report(true)) != mustJSON(t, b.Report(true)) {
		t.Fatal("publishing changed what the engine computes")
	}
	for n, s := range views {
		if !bytes.Equal(s.view.Encode(nil), s.state) {
			t.Fatalf("publish %d: its state bytes changed after it was published", n)
		}
		if got := mustJSON(t, s.view.Report(true)); got != s.report {
			t.Fatalf("publish %d: its report changed after it was published", n)
		}
		for j, r := range probe {
			p, err := s.view.Predict(r.Key, "rls:forget=0.99", r)
			if want, ok := s.pred[fmt.Sprint(j)]; ok && (err != nil || p.Value != want) {
				t.Fatalf("publish %d: row %d predicts %v (%v), %v when published", n, j, p.Value, err, want)
			}
		}
	}
	// A published copy refuses to learn.
	defer func() {
		if recover() == nil {
			t.Error("Apply on a published engine did not panic")
		}
	}()
	views[0].view.Apply(Position{Offset: 1 << 40}, events[0])
}

// TestPublishWhileApplying: readers predict and report from published
// copies while the owner applies events and publishes again (run under -race
// in CI: the copies share keys with the engine until a key changes).
func TestPublishWhileApplying(t *testing.T) {
	e := mustEngine(t, Config{}, "knn:k=3,window=50", "rls:forget=0.99", "mean:window=20")
	events := manyKeys(8000, 50, 9)
	for i, ev := range events[:500] {
		e.Apply(Position{Offset: int64(i)}, ev)
	}
	var cur atomic.Pointer[Engine]
	cur.Store(e.Publish())
	done := make(chan struct{})
	var wg sync.WaitGroup
	for g := 0; g < 4; g++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := 0; ; i++ {
				select {
				case <-done:
					return
				default:
				}
				v := cur.Load()
				r := events[i%len(events)]
				v.Predict(r.Key, "knn:k=3,window=50", r)
				if i%50 == 0 {
					v.Report(i%100 == 0)
				}
			}
		}()
	}
	for i, ev := range events[500:] {
		e.Apply(Position{Offset: int64(500 + i)}, ev)
		if i%25 == 0 {
			cur.Store(e.Publish())
		}
	}
	close(done)
	wg.Wait()
}

// TestMemoryBudget: past its memory budget the engine refuses events of new
// keys (kind memory_budget) and goes on learning the keys it has; the
// estimate it holds to is a function of the state, so a run cut in two by a
// checkpoint refuses exactly the keys an uninterrupted run refuses.
func TestMemoryBudget(t *testing.T) {
	cfg := Config{MemoryBudget: 200 << 10}
	events := manyKeys(4000, 400, 11)
	a := mustEngine(t, cfg, "rls:forget=0.99", "mean:window=20")
	refused := map[string]bool{}
	for i, ev := range events {
		before := a.StateBytes()
		_, err := a.Apply(Position{Offset: int64(i)}, ev)
		var r *Rejection
		switch {
		case errors.As(err, &r) && r.Kind == RejectMemory:
			if before < cfg.MemoryBudget {
				t.Fatalf("event %d refused at %d bytes, under the budget", i, before)
			}
			if !strings.Contains(err.Error(), "memory budget") {
				t.Errorf("the refusal does not say why: %v", err)
			}
			refused[ev.Key] = true
		case err != nil:
			t.Fatal(err)
		case refused[ev.Key]:
			t.Fatalf("key %s was refused, then taken", ev.Key)
		}
	}
	r := a.Report(false)
	if len(refused) == 0 || r.Keys == 400 || r.StateBytes < cfg.MemoryBudget {
		t.Fatalf("keys %d, refused %d, state %d bytes of a %d budget: the budget did not bind", r.Keys, len(refused), r.StateBytes, cfg.MemoryBudget)
	}
	if r.Rejected == 0 || r.Events+r.Rejected != int64(len(events)) {
		t.Errorf("applied %d and rejected %d of %d", r.Events, r.Rejected, len(events))
	}
	// Cut in two: the second half resumes from the first half's bytes.
	b := mustEngine(t, cfg, "rls:forget=0.99", "mean:window=20")
	for i, ev := range events[:1700] {
		b.Apply(Position{Offset: int64(i)}, ev)
	}
	c := mustEngine(t, cfg, "rls:forget=0.99", "mean:window=20")
	if err := c.Decode(b.Encode(nil)); err != nil {
		t.Fatal(err)
	}
	for i, ev := range events[1700:] {
		c.Apply(Position{Offset: int64(1700 + i)}, ev)
	}
	if a.Digest() != c.Digest() || mustJSON(t, a.Report(false)) != mustJSON(t, c.Report(false)) {
		t.Error("a run resumed from a checkpoint refuses other keys than an uninterrupted one")
	}
}

// TestPrefetchChangesNothing: reading keys' states ahead (as the replay
// does, PrefetchAhead events ahead, and given the wrong events too) leaves
// the state bytes as they were, and allocates nothing.
func TestPrefetchChangesNothing(t *testing.T) {
	events := manyKeys(3000, 100, 12)
	a := mustEngine(t, Config{}, allKinds[:5]...)
	b := mustEngine(t, Config{}, allKinds[:5]...)
	for i, ev := range events {
		a.Apply(Position{Offset: int64(i)}, ev)
		if j := i + PrefetchAhead; j < len(events) {
			b.Prefetch(events[j])
		}
		b.Prefetch(events[(i*7)%len(events)])
		b.Apply(Position{Offset: int64(i)}, ev)
	}
	if a.Digest() != b.Digest() {
		t.Error("prefetching changed the state")
	}
	if n := testing.AllocsPerRun(100, func() { b.Prefetch(events[7]) }); n != 0 {
		t.Errorf("Prefetch allocates %v times", n)
	}
}

// piecesStream hands sections over in pieces of 1, 2, …, 13 bytes in turn,
// so that every read of the decoder, at every place, spans pieces somewhere.
type piecesStream struct {
	secs []Section
	i    int // sections begun
	off  int // of the current one handed over
	n    int
}

func (s *piecesStream) NextSection() (bool, int32, int64, bool, error) {
	if s.i >= len(s.secs) {
		return false, 0, 0, false, nil
	}
	sec := s.secs[s.i]
	s.i, s.off = s.i+1, 0
	return sec.Global, sec.Partition, int64(len(sec.Bytes)), true, nil
}

func (s *piecesStream) Piece() ([]byte, error) {
	b := s.secs[s.i-1].Bytes
	if s.off >= len(b) {
		return nil, io.EOF
	}
	s.n = s.n%13 + 1
	k := min(s.n, len(b)-s.off)
	p := append([]byte(nil), b[s.off:s.off+k]...)
	s.off += k
	return p, nil
}

// TestDecodeStreamInPiecesOfAnySize: a state decoded from pieces of every
// small size is the state decoded whole (equal digests); cut short, it is
// refused as corrupt and the engine keeps what it had.
func TestDecodeStreamInPiecesOfAnySize(t *testing.T) {
	e := mustEngine(t, Config{}, allKinds[:5]...)
	for i, ev := range manyKeys(2000, 40, 12) {
		e.Apply(Position{Partition: int32(i % 3), Offset: int64(i)}, ev)
	}
	secs := e.Sections()
	d := mustEngine(t, Config{}, allKinds[:5]...)
	if err := d.DecodeStream(&piecesStream{secs: secs}); err != nil {
		t.Fatal(err)
	}
	if d.Digest() != e.Digest() {
		t.Fatal("decoded in pieces, the state differs")
	}
	short := slices.Clone(secs)
	last := len(short) - 1
	short[last].Bytes = short[last].Bytes[:len(short[last].Bytes)-5]
	before := d.Digest()
	if err := d.DecodeStream(&piecesStream{secs: short}); !errors.Is(err, ErrCorruptState) {
		t.Errorf("a section cut short: %v, want ErrCorruptState", err)
	}
	if d.Digest() != before {
		t.Error("a refused stream changed the engine")
	}
}
