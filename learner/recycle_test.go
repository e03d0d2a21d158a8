package learner

import (
	"math/rand/v2"
	"sync"
	"sync/atomic"
	"testing"
)

// TestRecyclingNeverChangesAHeldCopy: an engine that reuses the storage of
// replaced key versions goes on learning and publishing while readers on
// other goroutines hold published copies (sometimes across several
// publishes) and read every key of them: each copy's state digest is, for
// as long as it is held, the digest it had when published. Under the race
// detector (as CI runs it) a reuse of storage a held copy shows is also a
// reported race. Every kind of learner is in it.
func TestRecyclingNeverChangesAHeldCopy(t *testing.T) {
	e := mustEngine(t, Config{}, "knn:k=3,window=20", "rls:forget=0.99", "sliding-rls:window=15", "mean:window=10")
	e.RecycleReleased()
	events := manyKeys(8000, 40, 17)
	type pub struct {
		eng    *Engine
		digest [32]byte
	}
	var cur atomic.Pointer[pub]
	publish := func() {
		v := e.Publish()
		p := &pub{v, v.Digest()}
		old := cur.Swap(p)
		if old != nil {
			old.eng.Release()
		}
	}
	publish()
	var stop atomic.Bool
	var wg sync.WaitGroup
	var checked atomic.Int64
	for r := 0; r < 2; r++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			rng := rand.New(rand.NewPCG(uint64(r), 9))
			for !stop.Load() {
				p := cur.Load()
				if !p.eng.Acquire() {
					continue
				}
				for i := rng.IntN(3); i >= 0; i-- { // held across publishes, sometimes
					if p.eng.Digest() != p.digest {
						t.Error("a held copy changed")
					}
					checked.Add(1)
				}
				p.eng.Release()
			}
		}()
	}
	for i, ev := range events {
		e.Apply(Position{Offset: int64(i)}, ev)
		if i%50 == 49 {
			publish()
		}
	}
	stop.Store(true)
	wg.Wait()
	if checked.Load() == 0 {
		t.Fatal("no copy was read")
	}
	t.Logf("%d reads of held copies", checked.Load())
}

// TestRecyclingSavesTheCopies: in steady state a publisher that releases
// each copy once the next replaces it lets the engine copy changed keys into
// storage it reuses: a round of 40 events on 40 keys and a publish allocates
// a small part of what it does without recycling.
func TestRecyclingSavesTheCopies(t *testing.T) {
	round := func(recycle bool) float64 {
		e := mustEngine(t, Config{}, "rls:forget=0.99", "mean:window=10")
		if recycle {
			e.RecycleReleased()
		}
		events := manyKeys(4000, 40, 3)
		off := int64(0)
		var prev *Engine
		step := func() {
			for j := 0; j < 40; j++ {
				e.Apply(Position{Offset: off}, events[off%int64(len(events))])
				off++
			}
			v := e.Publish()
			if prev != nil {
				prev.Release()
			}
			prev = v
		}
		for i := 0; i < 50; i++ { // keys full-grown, copies in circulation
			step()
		}
		return testing.AllocsPerRun(200, step)
	}
	with, without := round(true), round(false)
	t.Logf("allocations per round: %.0f recycling, %.0f not", with, without)
	if with > without/3 {
		t.Errorf("recycling allocates %.0f per round against %.0f without", with, without)
	}
}
