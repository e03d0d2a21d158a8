package learner

import (
	"math"
	"testing"
)

// TestLeaderFollowsItsRule: the leader's figures equal those of a reference
// written out here from the rule LeaderConfig states — per key, each
// learner's last 500 scored errors; the leader for an event is the one
// chosen after the key's previous event; it is the learner of lowest recent
// RMSE among those with 30 recent errors, replaced only by one whose recent
// RMSE is below 0.95 × its own — over the partitioned stream with its shift,
// refused events and redeliveries.
func TestLeaderFollowsItsRule(t *testing.T) {
	evs, pos := partitioned(6000)
	e := mustEngine(t, Config{Leader: LeaderConfig{On: true}}, partKinds...)
	nl := len(partKinds)
	type keyRef struct {
		cur   int
		rings [][]float64
	}
	refs := map[string]*keyRef{}
	var sumSq float64
	var scored, unscored, switches int64
	for i, ev := range evs {
		applied, err := e.Apply(pos[i], ev)
		if err != nil || !applied {
			continue
		}
		k := refs[ev.Key]
		if k == nil {
			k = &keyRef{cur: -1, rings: make([][]float64, nl)}
			refs[ev.Key] = k
		}
		preds := make([]float64, nl)
		oks := make([]bool, nl)
		for j := range nl {
			preds[j], oks[j] = e.Last(j)
		}
		if k.cur >= 0 && oks[k.cur] {
			d := ev.Target - preds[k.cur]
			sumSq += d * d
			scored++
		} else {
			unscored++
		}
		rmse := make([]float64, nl)
		for j := range nl {
			if oks[j] {
				k.rings[j] = append(k.rings[j], ev.Target-preds[j])
				if len(k.rings[j]) > DefaultRecent {
					k.rings[j] = k.rings[j][1:]
				}
			}
			if len(k.rings[j]) >= MinIntervalEvents {
				s := 0.0
				for _, x := range k.rings[j] {
					s += x * x
				}
				rmse[j] = math.Sqrt(s / float64(len(k.rings[j])))
			}
		}
		best := -1
		for j := range nl {
			if len(k.rings[j]) >= MinIntervalEvents && (best < 0 || rmse[j] < rmse[best]) {
				best = j
			}
		}
		switch {
		case best < 0 || best == k.cur:
		case k.cur < 0:
			k.cur = best
		case rmse[best] < 0.95*rmse[k.cur]:
			k.cur = best
			switches++
		}
	}
	r := e.Report(false).Leader
	if r == nil {
		t.Fatal("no leader in the report")
	}
	want := math.Sqrt(sumSq / float64(scored))
	if r.Scored != scored || r.Unscored != unscored || r.Switches != switches || math.Abs(*r.RMSE-want) > 1e-12*want {
		t.Errorf("leader: scored %d unscored %d switches %d rmse %v; the rule's: %d %d %d %v", r.Scored, r.Unscored, r.Switches, *r.RMSE, scored, unscored, switches, want)
	}
	if switches == 0 {
		t.Error("the stream should make the leader change at least once")
	}
	for key, k := range refs {
		name, ok := e.Leader(key)
		if (k.cur >= 0) != ok || (ok && name != e.Config().Learners[k.cur].Name) {
			t.Errorf("key %s: leader %q (%v), the rule's %d", key, name, ok, k.cur)
		}
	}
	// The leader's state decodes, splits and merges like the rest.
	d := mustEngine(t, Config{Leader: LeaderConfig{On: true}}, partKinds...)
	if err := d.Decode(e.Encode(nil)); err != nil || d.Digest() != e.Digest() || reportJSON(t, d) != reportJSON(t, e) {
		t.Errorf("decoded, the leader state differs (%v)", err)
	}
	moved := d.Split([]int32{0, 3})
	if err := d.Merge(moved); err != nil || d.Digest() != e.Digest() || reportJSON(t, d) != reportJSON(t, e) {
		t.Errorf("split and merged back, the leader state differs (%v)", err)
	}
}

// TestLeaderTotalsAddUp: the leader's figures of three engines of two
// partitions each, added through their totals, are those of one engine that
// applied every event (as TestTotalsAddUpToOneEngine for the learners).
func TestLeaderTotalsAddUp(t *testing.T) {
	cfg := Config{Leader: LeaderConfig{On: true}}
	evs, pos := partitioned(6000)
	one := mustEngine(t, cfg, partKinds...)
	var parts [3]*Engine
	for i := range parts {
		parts[i] = mustEngine(t, cfg, partKinds...)
	}
	for i, ev := range evs {
		one.Apply(pos[i], ev)
		parts[pos[i].Partition%3].Apply(pos[i], ev)
	}
	sum := parts[0].Totals()
	for _, p := range parts[1:] {
		if err := sum.Add(p.Totals()); err != nil {
			t.Fatal(err)
		}
	}
	r, err := one.Config().ReportOf(sum)
	if err != nil {
		t.Fatal(err)
	}
	got, want := r.Leader, one.Report(false).Leader
	if got == nil || want == nil || got.Switches != want.Switches || got.Scored != want.Scored || *got.RMSE != *want.RMSE || want.Switches == 0 {
		t.Errorf("added: %+v\nwant %+v", got, want)
	}
	if err := sum.Add(mustEngine(t, Config{}, partKinds...).Totals()); err == nil {
		t.Error("totals without a leader were added to totals with one")
	}
}
