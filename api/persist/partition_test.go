package persist

import (
	"encoding/json"
	"errors"
	"fmt"
	"math/rand/v2"
	"testing"

	"tidemark/checkpoint"
	"tidemark/learner"
)

type placed struct {
	pos learner.Position
	ev  *learner.Event
}

// keyedStream is events of 30 keys, each key in partition key mod 6, with
// each partition's offsets counting up from 0.
func keyedStream(n int) []placed {
	rng := rand.New(rand.NewPCG(14, 6))
	next := map[int32]int64{}
	var out []placed
	for i := 0; i < n; i++ {
		k := rng.IntN(30)
		p := int32(k % 6)
		a, b := rng.NormFloat64(), rng.NormFloat64()
		ev := &learner.Event{Key: fmt.Sprintf("meter-%02d", k), Time: int64(1_760_000_000+60*i) * 1e9, HasTime: true,
			Target: 3*a - b + float64(k%5) + 0.1*rng.NormFloat64(), Features: []learner.Feature{{Name: "a", Num: a}, {Name: "b", Num: b}}}
		out = append(out, placed{learner.Position{Partition: p, Offset: next[p]}, ev})
		next[p]++
	}
	return out
}

func groupConfig(t *testing.T) learner.Config {
	var specs []learner.Spec
	for _, s := range []string{"rls:forget=0.99", "knn:k=5,window=100", "mean:window=50"} {
		sp, err := learner.ParseSpec(s)
		if err != nil {
			t.Fatal(err)
		}
		specs = append(specs, sp)
	}
	return learner.Config{Learners: specs}
}

// TestPartitionStateMovesBetweenInstances: two instances of a consumer group
// share a checkpoint directory, a store per partition. X owns all six
// partitions in generation 1 and checkpoints each; in generation 2, Y takes
// partitions 1 and 4: X checkpoints them and lets go (Split), Y adopts them
// from their stores, and each goes on with its own partitions' events and
// checkpoints them. A late write of X's for partition 1 is fenced off. A
// third instance that then adopts all six partitions from the stores holds
// the state of one engine that applied every event once — same state bytes,
// same report — so nothing was lost or applied twice across the move.
func TestPartitionStateMovesBetweenInstances(t *testing.T) {
	cfg := groupConfig(t)
	dir := t.TempDir()
	stores := map[int32]*checkpoint.Store{}
	for p := int32(0); p < 6; p++ {
		s, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: PartitionDir(dir, p)})
		if err != nil {
			t.Fatal(err)
		}
		defer s.Close()
		stores[p] = s
	}
	evs := keyedStream(6000)
	one, _ := learner.NewEngine(cfg)
	for _, e := range evs {
		one.Apply(e.pos, e.ev)
	}
	moved := map[int32]bool{1: true, 4: true}

	x, _ := learner.NewEngine(cfg)
	half := len(evs) / 2
	for _, e := range evs[:half] {
		x.Apply(e.pos, e.ev)
	}
	for p := int32(0); p < 6; p++ {
		if _, err := SavePartition(stores[p], x, p, checkpoint.Periodic, 0, 1, "x", nil); err != nil {
			t.Fatal(err)
		}
	}
	for _, e := range evs[half : half+300] {
		x.Apply(e.pos, e.ev)
	}
	// Generation 2: X checkpoints what it lets go of, then drops it.
	for p := range moved {
		if _, err := SavePartition(stores[p], x, p, checkpoint.Shutdown, 0, 1, "x", nil); err != nil {
			t.Fatal(err)
		}
	}
	x.Split([]int32{1, 4})
	y, _ := learner.NewEngine(cfg)
	for p := range moved {
		st, err := AdoptPartition(stores[p], y, "")
		if err != nil || st == nil {
			t.Fatalf("Y adopting partition %d: %v", p, err)
		}
	}
	// Each owner reads on from the position its state covers.
	for _, e := range evs[half+300:] {
		if moved[e.pos.Partition] {
			y.Apply(e.pos, e.ev)
		} else {
			x.Apply(e.pos, e.ev)
		}
	}
	for p := int32(0); p < 6; p++ {
		owner, name := x, "x"
		if moved[p] {
			owner, name = y, "y"
		}
		if _, err := SavePartition(stores[p], owner, p, checkpoint.Periodic, 0, 2, name, nil); err != nil {
			t.Fatal(err)
		}
	}
	// X, still thinking itself in generation 1, writes partition 1 late.
	stale, _ := learner.NewEngine(cfg)
	for _, e := range evs[:half] {
		if e.pos.Partition == 1 {
			stale.Apply(e.pos, e.ev)
		}
	}
	if _, err := SavePartition(stores[1], stale, 1, checkpoint.Periodic, 0, 1, "x", nil); !errors.Is(err, checkpoint.ErrFenced) {
		t.Fatalf("a late write of a lost partition: %v, want ErrFenced", err)
	}

	z, _ := learner.NewEngine(cfg)
	for p := int32(0); p < 6; p++ {
		if st, err := AdoptPartition(stores[p], z, ""); err != nil || st == nil {
			t.Fatalf("Z adopting partition %d: %v", p, err)
		}
	}
	if z.Digest() != one.Digest() {
		t.Error("the partitions' newest checkpoints together differ from one engine's state")
	}
	rz, _ := json.Marshal(z.Report(true))
	ro, _ := json.Marshal(one.Report(true))
	if string(rz) != string(ro) {
		t.Errorf("reports differ:\n got %.300s\nwant %.300s", rz, ro)
	}
}

// TestPartitionStateSurvivesAKill: X owns all six partitions, checkpoints
// them, applies 300 more events and is killed (its engine gone, nothing
// more written). In the next generation a restarted X adopts four
// partitions and Y two, each from the newest checkpoints, and reads each
// partition on from the offset after what its state covers (as the Kafka
// intake does): the 300 events are applied again, once. Adopted together,
// the stores then hold the state of one engine that applied every event once.
func TestPartitionStateSurvivesAKill(t *testing.T) {
	cfg := groupConfig(t)
	dir := t.TempDir()
	store := func(p int32) *checkpoint.Store {
		s, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: PartitionDir(dir, p)})
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { s.Close() })
		return s
	}
	evs := keyedStream(5000)
	one, _ := learner.NewEngine(cfg)
	for _, e := range evs {
		one.Apply(e.pos, e.ev)
	}
	x, _ := learner.NewEngine(cfg)
	half := len(evs) / 2
	for _, e := range evs[:half] {
		x.Apply(e.pos, e.ev)
	}
	for p := int32(0); p < 6; p++ {
		if _, err := SavePartition(store(p), x, p, checkpoint.Periodic, 0, 1, "x", nil); err != nil {
			t.Fatal(err)
		}
	}
	for _, e := range evs[half : half+300] {
		x.Apply(e.pos, e.ev)
	}
	x = nil // kill -9

	x2, _ := learner.NewEngine(cfg)
	y, _ := learner.NewEngine(cfg)
	owner := func(p int32) *learner.Engine {
		if p == 1 || p == 4 {
			return y
		}
		return x2
	}
	for p := int32(0); p < 6; p++ {
		if st, err := AdoptPartition(store(p), owner(p), ""); err != nil || st == nil {
			t.Fatalf("adopting partition %d: %v", p, err)
		}
	}
	for _, e := range evs[half:] {
		if eng := owner(e.pos.Partition); !eng.Covers(e.pos) {
			eng.Apply(e.pos, e.ev)
		}
	}
	if err := x2.Merge(y); err != nil {
		t.Fatal(err)
	}
	if x2.Digest() != one.Digest() {
		t.Error("after the kill and the move, the state differs from one engine's")
	}
}
