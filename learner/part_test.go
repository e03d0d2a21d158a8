package learner

import (
	"encoding/json"
	"fmt"
	"strconv"
	"sync"
	"testing"
)

// partitioned returns events of many keys with each key's partition among
// six (the key's number mod 6), a shift half-way so that drift alarms are
// raised, and some events that the engine refuses (a feature missing) or
// already covers (a redelivery).
func partitioned(n int) ([]*Event, []Position) {
	evs := manyKeys(n, 60, 21)
	var pos []Position
	next := map[int32]int64{}
	var out []*Event
	for i, ev := range evs {
		k, _ := strconv.Atoi(ev.Key[len("room-"):])
		p := int32(k % 6)
		if i > n/2 {
			ev.Target += 8 // a shift: the detectors raise alarms
		}
		if i%97 == 5 {
			ev.Features = ev.Features[:1] // refused: feature b missing
		}
		out = append(out, ev)
		pos = append(pos, Position{p, next[p]})
		if i%89 == 7 { // a redelivery of the same position
			out = append(out, ev)
			pos = append(pos, Position{p, next[p]})
		}
		next[p]++
	}
	return out, pos
}

func reportJSON(t *testing.T, e *Engine) string {
	t.Helper()
	b, err := json.Marshal(e.Report(true))
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// splitRun applies the partitioned stream to one engine and, split by
// partition, to three (each two of the six partitions).
func splitRun(t *testing.T) (*Engine, [3]*Engine) {
	t.Helper()
	evs, pos := partitioned(6000)
	one := mustEngine(t, Config{}, partKinds...)
	var parts [3]*Engine
	for i := range parts {
		parts[i] = mustEngine(t, Config{}, partKinds...)
	}
	for i, ev := range evs {
		one.Apply(pos[i], ev)
		parts[pos[i].Partition%3].Apply(pos[i], ev)
	}
	return one, parts
}

var partKinds = []string{"knn:k=5,window=200", "rls:forget=0.99", "sliding-rls:window=100", "mean:window=50"}

// TestMergedEnginesAreOneEngine: three engines, each applying only the events
// of its two of six partitions, merged, hold the state of one engine that
// applied every event — the same state bytes (digest) and the same report,
// per key, counters, drift alarms and last alarm included, bit for bit (the
// pooled figures are exact sums). The reference is the engine itself fed
// every event: a check that splitting the work changes nothing (common
// practice for partitioned computations); the learners' numbers themselves
// are checked against outside references elsewhere (NIST StRD, gonum).
func TestMergedEnginesAreOneEngine(t *testing.T) {
	one, parts := splitRun(t)
	if one.Alarms() == 0 || one.Rejected() == 0 || one.Report(false).Duplicates == 0 {
		t.Fatalf("the stream should raise alarms, refuse and redeliver events: %d %d %d", one.Alarms(), one.Rejected(), one.Report(false).Duplicates)
	}
	m := parts[0]
	for _, o := range parts[1:] {
		if err := m.Merge(o); err != nil {
			t.Fatal(err)
		}
	}
	if m.Digest() != one.Digest() {
		t.Error("merged, the state bytes differ from one engine's")
	}
	if got, want := reportJSON(t, m), reportJSON(t, one); got != want {
		t.Errorf("merged, the report differs:\n got %.300s\nwant %.300s", got, want)
	}
	if err := m.Merge(mustEngine(t, Config{}, partKinds[:2]...)); err == nil {
		t.Error("merging an engine of other learners: no error")
	}
}

// TestSplitEnginesGoOnAndMergeBack: an engine split in two (partitions 1 and
// 4 moved out) reports exactly its own partitions; both go on learning
// their partitions' events on goroutines of their own (the race detector
// watches the working space they no longer share), and merged back they
// hold the state of one engine that applied everything. A copy published
// before the split does not change.
func TestSplitEnginesGoOnAndMergeBack(t *testing.T) {
	evs, pos := partitioned(8000)
	half := len(evs) / 2
	one := mustEngine(t, Config{}, partKinds...)
	a := mustEngine(t, Config{}, partKinds...)
	for i, ev := range evs[:half] {
		one.Apply(pos[i], ev)
		a.Apply(pos[i], ev)
	}
	view := a.Publish()
	before := view.Digest()
	b := a.Split([]int32{1, 4, 99})
	if got := fmt.Sprint(b.Positions()); got != fmt.Sprint([]Position{{1, pos[lastOf(pos[:half], 1)].Offset}, {4, pos[lastOf(pos[:half], 4)].Offset}}) {
		t.Errorf("the split engine holds partitions %s", got)
	}
	for _, ks := range b.byName {
		if ks.partition != 1 && ks.partition != 4 {
			t.Fatalf("key %s of partition %d moved", ks.key, ks.partition)
		}
	}
	if a.Report(false).Keys+b.Report(false).Keys != one.Report(false).Keys || a.Applied()+b.Applied() != one.Applied() {
		t.Error("the two halves do not add up")
	}
	var wg sync.WaitGroup
	for _, e := range []*Engine{a, b} {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := half; i < len(evs); i++ {
				if e.parts[pos[i].Partition] != nil || (e == a) == (pos[i].Partition != 1 && pos[i].Partition != 4) {
					e.Apply(pos[i], evs[i])
				}
			}
		}()
	}
	for i := half; i < len(evs); i++ {
		one.Apply(pos[i], evs[i])
	}
	wg.Wait()
	if view.Digest() != before {
		t.Error("a copy published before the split changed")
	}
	if err := a.Merge(b); err != nil {
		t.Fatal(err)
	}
	if a.Digest() != one.Digest() || reportJSON(t, a) != reportJSON(t, one) {
		t.Error("split, continued and merged back, the state differs from one engine's")
	}
	v2 := a.Publish()
	if v2.Digest() != one.Digest() {
		t.Error("its published copy differs")
	}
}

func lastOf(pos []Position, p int32) int {
	last := -1
	for i, q := range pos {
		if q.Partition == p {
			last = i
		}
	}
	return last
}

// TestTotalsAddUpToOneEngine: the totals of three engines, each holding two
// of six partitions, sent through JSON (as instances of a consumer group
// send them to one another) and added, report what one engine that applied
// every event reports, bit for bit — counters, pooled errors, drift counts
// and the last alarm. The reference is the engine itself, as in
// TestMergedEnginesAreOneEngine.
func TestTotalsAddUpToOneEngine(t *testing.T) {
	one, parts := splitRun(t)
	var sum Totals
	for i, e := range []*Engine{parts[2], parts[0], parts[1]} { // any order
		b, err := json.Marshal(e.Totals())
		if err != nil {
			t.Fatal(err)
		}
		var got Totals
		if err := json.Unmarshal(b, &got); err != nil {
			t.Fatal(err)
		}
		if i == 0 {
			sum = got
		} else if err := sum.Add(got); err != nil {
			t.Fatal(err)
		}
	}
	if err := sum.Add(parts[0].Totals()); err == nil {
		t.Error("adding a partition twice was not refused")
	}
	r, err := one.Config().ReportOf(sum)
	if err != nil {
		t.Fatal(err)
	}
	got, _ := json.Marshal(r)
	want, _ := json.Marshal(one.Report(false))
	if string(got) != string(want) {
		t.Errorf("added totals report\n%s\nwant\n%s", got, want)
	}
}

// TestEventTimesFollowThePartitions: the range of event times an engine
// applied is the minimum and maximum over the events Apply accepted (written
// out here from Apply's answers), per partition and overall; it survives
// encoding and moves with Split and Merge.
func TestEventTimesFollowThePartitions(t *testing.T) {
	evs, pos := partitioned(3000)
	e := mustEngine(t, Config{}, partKinds...)
	type rng struct{ lo, hi int64 }
	want := map[int32]*rng{}
	all := &rng{lo: 1 << 62, hi: -1 << 62}
	for i, ev := range evs {
		if ok, _ := e.Apply(pos[i], ev); ok {
			r := want[pos[i].Partition]
			if r == nil {
				r = &rng{lo: ev.Time, hi: ev.Time}
				want[pos[i].Partition] = r
			}
			r.lo, r.hi = min(r.lo, ev.Time), max(r.hi, ev.Time)
			all.lo, all.hi = min(all.lo, ev.Time), max(all.hi, ev.Time)
		}
	}
	check := func(what string, e *Engine) {
		t.Helper()
		if lo, hi, ok := e.EventTimes(); !ok || lo != all.lo || hi != all.hi {
			t.Errorf("%s: event times %d..%d (%v), want %d..%d", what, lo, hi, ok, all.lo, all.hi)
		}
		for p, r := range want {
			if lo, hi, ok := e.EventTimes(p); !ok || lo != r.lo || hi != r.hi {
				t.Errorf("%s: partition %d: %d..%d, want %d..%d", what, p, lo, hi, r.lo, r.hi)
			}
		}
	}
	check("applied", e)
	d := mustEngine(t, Config{}, partKinds...)
	if err := d.Decode(e.Encode(nil)); err != nil {
		t.Fatal(err)
	}
	check("decoded", d)
	moved := d.Split([]int32{1, 4})
	if lo, hi, _ := moved.EventTimes(); lo != min(want[1].lo, want[4].lo) || hi != max(want[1].hi, want[4].hi) {
		t.Errorf("split off: %d..%d", lo, hi)
	}
	d.Merge(moved)
	check("merged back", d)
}
