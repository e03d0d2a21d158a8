package api

import (
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"time"

	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Group mode (Kafka intake): the instances of one consumer group split the
// topic's partitions, and the state of a partition follows it. Each
// partition has a checkpoint store of its own in a directory every instance
// reaches (Config.CheckpointDir); the instance that owns a partition loads
// its newest good state when the partition is assigned, checkpoints it on
// the usual cadence, and checkpoints it once more when the partition is
// revoked, before the group goes on. The engine holds the partitions this
// instance owns and nothing else; events of other partitions are never
// applied here.
//
// Fencing: every partition checkpoint carries the consumer-group generation
// in which its writer owned the partition, and its version lies in that
// generation's band (checkpoint.Manifest.Generation), so the newest version
// of a store is always the newest owner's. A writer whose generation is older
// than the store's newest checkpoint is refused (checkpoint.ErrFenced) and
// gives the partition up: an instance that lost its partitions while it was
// slow or cut off cannot overwrite the state of their new owner.

// group is the loop's record of the partitions it owns. The loop alone uses
// it.
type group struct {
	dir      string // the shared checkpoint directory
	instance string // this instance's name, recorded as each checkpoint's owner
	gen      intake.Generation
	joined   bool               // assigned partitions at least once
	owned    map[int32]*partSt  // the partitions this instance owns
	whole    *learner.Engine    // partitions of a whole-state checkpoint from before groups, taken as they are first assigned
	parked   map[int32]*partSt  // revoked, still in the engine until the next assignment says whether they come back
	fenced   map[int32]struct{} // given up after a write was fenced, until the next assignment
}

// partSt is one owned partition's checkpoint store and what was last written.
type partSt struct {
	store *checkpoint.Store
	last  checkpoint.Info // the newest checkpoint written or adopted here (zero: none)
	skip  *skipRule       // a restore's skip rule while it applies to this partition
}

func newGroup(dir, instance string) *group {
	return &group{dir: dir, instance: instance, owned: map[int32]*partSt{}, parked: map[int32]*partSt{}}
}

func (g *group) owns(p int32) bool { return g.owned[p] != nil }

// ownedParts lists the owned partitions in order.
func (g *group) ownedParts() []int32 {
	out := make([]int32, 0, len(g.owned))
	for p := range g.owned {
		out = append(out, p)
	}
	slices.Sort(out)
	return out
}

// loopOwner hands the Kafka intake's calls to the loop, through the items
// channel: an assignment or revocation is handled in order with the events
// delivered before it.
type loopOwner struct{ l *loop }

func (o loopOwner) Assigned(gen intake.Generation, parts []int32) (map[int32]int64, error) {
	var covered map[int32]int64
	var err error
	o.l.control(func(l *loop) { covered, err = l.assign(gen, parts) })
	return covered, err
}

func (o loopOwner) Revoked(gen intake.Generation, parts []int32) {
	o.l.control(func(l *loop) { l.revoke(gen, parts) })
}

// control runs f on whoever owns the engine — the loop, or stopSource while
// it waits for the source to stop — and waits for it.
func (l *loop) control(f func(*loop)) {
	done := make(chan struct{})
	l.items <- item{ctl: func(l *loop) { f(l); close(done) }}
	<-done
}

// assign takes the partitions of a new generation: those still held from
// the last one are kept when no one wrote their state since; the others are
// loaded from their stores. It returns the offsets the state covers.
func (l *loop) assign(gen intake.Generation, parts []int32) (map[int32]int64, error) {
	g := l.group
	g.gen, g.joined, g.fenced = gen, true, nil
	for p, ps := range g.parked {
		delete(g.parked, p)
		if slices.Contains(parts, p) && ps.stillNewest() {
			g.owned[p] = ps
			continue
		}
		l.dropPartition(p, ps)
	}
	var errs []error
	for _, p := range parts {
		if g.owned[p] != nil {
			continue
		}
		ps, err := l.loadPartition(p)
		if err != nil {
			errs = append(errs, fmt.Errorf("partition %d: %w", p, err))
			continue
		}
		g.owned[p] = ps
	}
	covered := map[int32]int64{}
	for _, pos := range l.eng.Positions() {
		if g.owns(pos.Partition) {
			covered[pos.Partition] = pos.Offset
		}
	}
	l.cfg.Log.Info("consumer group: partitions assigned", "generation", gen.ID, "partitions", parts, "covered", covered)
	l.setCatchUp()
	l.publish()
	return covered, errors.Join(errs...)
}

// revoke checkpoints the partitions of an ending generation for their next
// owner and parks them: they stay in the engine, unused, until the next
// assignment says whether they come back.
func (l *loop) revoke(gen intake.Generation, parts []int32) {
	g := l.group
	for _, p := range parts {
		ps := g.owned[p]
		if ps == nil {
			continue
		}
		if !l.changedSince(p, ps) {
			// nothing new since its last checkpoint
		} else if _, err := l.savePartition(p, ps, checkpoint.Handover); err != nil && !errors.Is(err, checkpoint.ErrFenced) {
			l.cfg.Log.Error("consumer group: could not checkpoint a revoked partition; its next owner resumes from its last checkpoint",
				"partition", p, "error", err)
		}
		if g.owned[p] != nil { // not fenced
			delete(g.owned, p)
			g.parked[p] = ps
		}
	}
	l.cfg.Log.Info("consumer group: partitions revoked", "generation", gen.ID, "partitions", parts)
	l.ready.Store(false)
	l.publish()
}

// loadPartition opens partition p's store and merges its newest good state
// into the engine.
func (l *loop) loadPartition(p int32) (*partSt, error) {
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: persist.PartitionDir(l.group.dir, p), Retain: l.cfg.Retain, FS: l.cfg.CheckpointFS})
	if err != nil {
		return nil, err
	}
	ps := &partSt{store: store}
	start := time.Now()
	st, err := persist.AdoptPartition(store, l.eng, adoptHint)
	if err != nil {
		store.Close()
		return nil, err
	}
	defer func() {
		if err := l.replayAnswers(l.eng, []int32{p}); err != nil {
			l.cfg.Log.Error("consumer group: the answers served for a partition cannot be read back; they are not scored", "partition", p, "error", err)
		}
	}()
	if st == nil && l.group.whole != nil {
		if _, _, ok := l.group.whole.PartitionCounts(p); ok {
			// The partition's state so far is in the whole-state checkpoint
			// this instance kept before it joined a group: it goes on from
			// there, and the partition's store gets its first checkpoint.
			if err := l.eng.Merge(l.group.whole.Split([]int32{p})); err != nil {
				store.Close()
				return nil, err
			}
			if _, err := l.savePartition(p, ps, checkpoint.Handover); err != nil {
				l.cfg.Log.Error("consumer group: could not write the first checkpoint of a partition taken from the whole-state checkpoint", "partition", p, "error", err)
			}
			l.cfg.Log.Info("consumer group: partition state taken from the whole-state checkpoint", "partition", p)
			return ps, nil
		}
	}
	if st != nil {
		ps.last = st.Info
		var src serviceSource
		if json.Unmarshal(st.Manifest.Source, &src) == nil && src.Skip != nil && !src.Skip.done(l.eng) {
			ps.skip = src.Skip // a restore's catch-up goes on here
		}
		l.lastAlarms = l.eng.Alarms()
		l.cfg.Log.Info("consumer group: partition state loaded", "partition", p, "version", st.Manifest.Version,
			"owner_before", st.Manifest.Owner, "events", st.Manifest.Events, "took", time.Since(start).Round(time.Millisecond).String())
	}
	return ps, nil
}

// adoptWholeState loads the newest good whole-state checkpoint of dir, as
// a service kept before it was an instance of a consumer group, when there
// is one: each of its partitions is taken from it the first time the
// partition is assigned here and its own store holds nothing, so that
// upgrading loses no state.
func (l *loop) adoptWholeState(dir string) error {
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: dir, ReadOnly: true, FS: l.cfg.CheckpointFS})
	if err != nil {
		return nil // no such directory: nothing to take
	}
	defer store.Close()
	whole, err := learner.NewEngine(l.eng.Config())
	if err != nil {
		return err
	}
	st, skipped, err := persist.AdoptNewest(store, whole, adoptHint)
	for _, e := range skipped {
		l.cfg.Log.Warn("skipping a checkpoint that fails its checks", "error", e)
	}
	if err != nil || st == nil {
		return err
	}
	l.group.whole = whole
	l.cfg.Log.Info("a whole-state checkpoint from before the consumer group: its partitions are taken from it as they are assigned",
		"version", st.Manifest.Version, "position", positionsText(st.Manifest.Positions))
	return nil
}

// dropPartition takes p's state out of the engine and closes its store.
func (l *loop) dropPartition(p int32, ps *partSt) {
	l.closeAnswerLog(p)
	l.eng.Split([]int32{p}) // the split-off engine is garbage
	l.lastAlarms = l.eng.Alarms()
	ps.store.Close()
}

// saved is the partition's high-water offset at its last checkpoint (-1:
// none).
func (ps *partSt) saved() int64 {
	if len(ps.last.Position) == 0 {
		return -1
	}
	return ps.last.Position[0].Offset
}

// stillNewest reports whether the store's newest checkpoint is still the
// one this instance last wrote or loaded: no one owned the partition and
// wrote since, so the state held here may go on.
func (ps *partSt) stillNewest() bool {
	vs, err := ps.store.Versions()
	if err != nil {
		return false
	}
	if len(vs) == 0 {
		return ps.last.Version == 0
	}
	return vs[len(vs)-1] == ps.last.Version
}

// savePartition checkpoints owned partition p. A write fenced by a newer
// owner gives the partition up at once.
func (l *loop) savePartition(p int32, ps *partSt, reason checkpoint.Reason) (checkpoint.Info, error) {
	g := l.group
	info, err := persist.SavePartition(ps.store, l.eng, p, reason, ps.last.Version, int64(g.gen.ID), g.instance,
		serviceSource{Kind: "service", Skip: ps.skip, Answers: answerCoverage(l.eng, []int32{p})})
	if errors.Is(err, checkpoint.ErrFenced) {
		l.cfg.Log.Warn("consumer group: another instance owns the partition now; giving it up", "partition", p, "error", err)
		delete(g.owned, p)
		l.dropPartition(p, ps)
		if g.fenced == nil {
			g.fenced = map[int32]struct{}{}
		}
		g.fenced[p] = struct{}{}
		return info, err
	}
	if err != nil {
		l.metrics.checkpointFailures.Inc()
		return info, err
	}
	ps.last = info
	l.lastCk = info
	l.trimAnswerLogs(ps.store, []int32{p})
	l.cfg.Log.Info("checkpoint", "partition", p, "version", info.Version, "reason", reason, "events", info.Events, "bytes", info.Bytes)
	return info, nil
}

// changedSince reports whether owned partition p has events the engine
// applied (or passed) since its last checkpoint.
func (l *loop) changedSince(p int32, ps *partSt) bool {
	for _, pos := range l.eng.Positions() {
		if pos.Partition == p {
			return pos.Offset != ps.saved()
		}
	}
	return false // no event of it yet
}

// checkpointParts checkpoints every owned partition that changed since its
// last checkpoint (every one when all is set) and commits their offsets.
func (l *loop) checkpointParts(reason checkpoint.Reason, all bool) ([]checkpoint.Info, error) {
	var infos []checkpoint.Info
	var errs []error
	var covered []learner.Position
	hwm := map[int32]int64{}
	for _, pos := range l.eng.Positions() {
		hwm[pos.Partition] = pos.Offset
	}
	for _, p := range l.group.ownedParts() {
		ps := l.group.owned[p]
		at, ok := hwm[p]
		if !ok || (!all && !l.changedSince(p, ps)) {
			continue
		}
		info, err := l.savePartition(p, ps, reason)
		if err != nil {
			errs = append(errs, fmt.Errorf("partition %d: %w", p, err))
			continue
		}
		infos = append(infos, info)
		covered = append(covered, learner.Position{Partition: p, Offset: at})
	}
	l.sinceCk, l.lastCkTime = 0, time.Now()
	if err := l.dead.flush(); err != nil {
		l.cfg.Log.Error("dead letters: flush failed", "error", err)
	}
	if len(covered) > 0 {
		l.src.Checkpointed(covered, nil)
	}
	return infos, errors.Join(errs...)
}

// groupCheckpoints lists the owned partitions' checkpoints, oldest first
// within each partition, partitions in order.
func (l *loop) groupCheckpoints() []checkpoint.Info {
	var out []checkpoint.Info
	for _, p := range l.group.ownedParts() {
		list, err := l.group.owned[p].store.List()
		if err != nil {
			continue
		}
		for i := range list {
			list[i].Partition = &p
		}
		out = append(out, list...)
	}
	return out
}

// all returns the stores of every partition held, owned or parked (none
// when g is nil).
func (g *group) all() []*partSt {
	if g == nil {
		return nil
	}
	var out []*partSt
	for _, ps := range g.owned {
		out = append(out, ps)
	}
	for _, ps := range g.parked {
		out = append(out, ps)
	}
	return out
}

// restorePartition sets the state of one owned partition back to version v
// of its store and resumes as asked; the other partitions go on untouched.
// The restored state is written as the partition's newest checkpoint (in
// this generation, so fenced like any other) before it replaces the live
// one; then the intake rejoins the group, so that the partition is read again
// from the restored position by whichever instance it is assigned to, which
// loads it from that checkpoint (skip rule included). It runs on the loop.
func (l *loop) restorePartition(v uint64, req RestoreRequest) cmdResult {
	if req.Partition == nil {
		return cmdResult{err: cmdErr(ErrInvalidRequest, "in a consumer group each partition has its own checkpoints: say which partition (\"partition\": N) "+
			"or restore every partition with POST /v1/cluster/restore")}
	}
	res := l.restoreOne(*req.Partition, v, req)
	if res.err == nil {
		l.startSource() // rejoins the group: the partition is read again from the restored position
		l.publish()
	}
	return res
}

// restoreParts restores each partition of versions to its version, for a
// group-wide restore; one rejoin follows them all.
func (l *loop) restoreParts(versions map[int32]uint64, req RestoreRequest) map[int32]cmdResult {
	out := map[int32]cmdResult{}
	done := false
	for p, v := range versions {
		out[p] = l.restoreOne(p, v, req)
		done = done || out[p].err == nil
	}
	if done {
		l.startSource()
		l.publish()
	}
	return out
}

// restoreOne restores partition p to version v (see restorePartition),
// without rejoining.
func (l *loop) restoreOne(p int32, v uint64, req RestoreRequest) cmdResult {
	ps := l.group.owned[p]
	if ps == nil {
		return cmdResult{err: cmdErr(ErrMoved, "this instance does not own partition %d (it moved); retry", p)}
	}
	var live []learner.Position
	for _, pos := range l.eng.Positions() {
		if pos.Partition == p {
			live = append(live, pos)
		}
	}
	mode, rule, err := req.rule(live)
	if err != nil {
		return cmdResult{err: cmdErr(ErrInvalidRequest, "%v", err)}
	}
	failed := func(err error) cmdResult {
		return cmdResult{err: cmdErr(ErrConflict, "checkpoint %d of partition %d fails its checks and cannot be restored: %v", v, p, err).withCause(err)}
	}
	restored, res := l.readForRestore(ps.store, v, rule,
		cmdErr(ErrNoCheckpoint, "partition %d has no checkpoint %d; GET /v1/checkpoints lists them", p, v), failed)
	if restored == nil {
		return res
	}
	if _, _, ok := restored.PartitionCounts(p); !ok {
		return cmdResult{err: cmdErr(ErrConflict, "checkpoint %d does not hold partition %d", v, p)}
	}
	if mode == ResumeFromNow {
		restored.CoverUpTo(live)
	}
	if err := l.replayAnswers(restored, []int32{p}); err != nil {
		return cmdResult{err: cmdErr(ErrNotStored, "restore of checkpoint %d of partition %d not done: the answers served since cannot be read back (%v)", v, p, err).withCause(err)}
	}
	// Recorded first: a restore happens as a whole or not at all.
	rps := &partSt{store: ps.store, last: ps.last}
	if mode == ResumeSkip {
		rps.skip = rule
	}
	info, err := persist.SavePartition(ps.store, restored, p, checkpoint.Restore, v, int64(l.group.gen.ID), l.group.instance,
		serviceSource{Kind: "service", Skip: rps.skip, Answers: answerCoverage(restored, []int32{p})})
	if err != nil {
		l.cfg.Log.Error("restore not done: the checkpoint recording it could not be written; the state is unchanged", "partition", p, "version", v, "error", err)
		return cmdResult{err: cmdErr(ErrNotStored, "restore of checkpoint %d of partition %d not done: the checkpoint recording it could not be written (%v); "+
			"the partition goes on from its state before this request", v, p, err).withCause(err)}
	}
	rps.last = info
	l.eng.Split([]int32{p})
	if err := l.eng.Merge(restored); err != nil {
		panic(fmt.Sprintf("api: a restored partition does not merge back: %v", err)) // same configuration, partition just taken out
	}
	l.group.owned[p] = rps
	l.lastAlarms, l.lastCk = l.eng.Alarms(), info
	l.cfg.Log.Warn("restored", "partition", p, "version", v, "resume", mode.String())
	return cmdResult{info: info}
}
