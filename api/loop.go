package api

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"path/filepath"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// loop owns the engine: on one goroutine (run) it applies the source's
// events in position order, takes checkpoints on cadence, restores, skips
// journal damage on request and publishes snapshots. HTTP handlers reach it
// only by commands (do) and read only what it publishes; its errors reach
// them as the sentinels of errors.go, mapped to statuses in one place.
// Shutdown order (Service.Run): stop the source, take a shutdown
// checkpoint, commit, close.
type loop struct {
	cfg     Config
	eng     *learner.Engine // the loop's alone
	store   *checkpoint.Store
	src     intake.Source // where events come from
	dead    *deadLetters
	metrics *metrics
	curves  *curves
	notes   *notes

	snap  *atomic.Pointer[snapshot] // where it publishes (the service's)
	fault *atomic.Pointer[fault]    // what stopped intake, or nil (the service's)
	cmds  chan command
	ready atomic.Bool

	lastCk      checkpoint.Info
	sinceCk     int64
	lastCkTime  time.Time
	skip        *skipRule
	caughtUp    []learner.Position // ready once the engine covers these
	availKnown  bool               // the source has said what it holds (Kafka: once the brokers answered)
	lastAlarms  int64
	curveAt     int64 // the applied count of the last curve point
	generation  int
	sourceStop  context.CancelFunc
	items       chan item
	sourceDone  chan struct{}
	sourceMu    sync.Mutex
	ckPositions map[uint64][]learner.Position // positions each known checkpoint covers
	handled     atomic.Int64                  // events handled (applied, rejected or passed) since start
	group       *group                        // the partitions owned in a consumer group (group.go); nil but with Kafka intake
	alarmCounts []int64                       // each learner's alarms when the page was last told (noteAlarms)
	answers     answerLogs                    // the logs of the answers served (answers.go)
}

// item is one event handed from a source to the loop, decoded by the
// source's goroutine so that decoding overlaps learning.
type item struct {
	gen    int
	pos    learner.Position
	data   []byte         // as received, for the dead-letter file
	ev     *learner.Event // from eventPool; nil when decoding failed
	decErr error
	ctl    func(*loop) // when set, not an event: work for the engine's owner, in order with the events (loop.control)
}

// eventPool recycles decoded events between the sources and the loop.
var eventPool = sync.Pool{New: func() any { return new(learner.Event) }}

// serviceSource is the manifest's record of what the service was doing.
type serviceSource struct {
	Kind string    `json:"kind"` // "service"
	Skip *skipRule `json:"skip,omitempty"`
	// Answers is, per answer log ("partition-NNNNN/NAME"), the last
	// offset the state holds: what the log may forget once no retained
	// checkpoint needs it (answers.go).
	Answers map[string]int64 `json:"answers,omitempty"`
}

// command is work the loop does for an HTTP handler.
type command struct {
	run   func(l *loop) cmdResult
	reply chan cmdResult
}

type cmdResult struct {
	info checkpoint.Info
	err  error
}

func decodeItem(it *item) { decodeMapped(it, nil) }

// decodeMapped decodes it, its payload first rewritten by m when m is set
// (a source whose events are in another shape: Config.Fields).
func decodeMapped(it *item, m *intake.Mapper) {
	if it.data == nil {
		it.decErr = fmt.Errorf("%w: the source could not read the event at %v (a history line longer than %d bytes)",
			learner.ErrInvalidEvent, it.pos, intake.MaxLineBytes)
		return
	}
	data := it.data
	if m != nil {
		out, err := m.Canonical(data)
		if err != nil {
			it.decErr = fmt.Errorf("%w: %v", learner.ErrInvalidEvent, err)
			return
		}
		data = out
	}
	ev := eventPool.Get().(*learner.Event)
	if err := learner.DecodeEvent(data, ev); err != nil {
		eventPool.Put(ev)
		it.decErr = err
		return
	}
	it.ev = ev
}

// restoreLatest loads the newest good checkpoint at start. In a consumer
// group the state comes partition by partition, as they are assigned.
func (l *loop) restoreLatest() error {
	if l.group != nil {
		l.lastCkTime = time.Now()
		l.setCatchUp()
		return nil
	}
	c, skipped, err := persist.AdoptNewest(l.store, l.eng, adoptHint)
	for _, e := range skipped {
		l.cfg.Log.Warn("skipping a checkpoint that fails its checks", "error", e)
	}
	if err == nil && c == nil {
		l.cfg.Log.Info("no checkpoint yet; starting from the beginning of the stream")
		l.lastCkTime = time.Now()
		l.setCatchUp()
		return l.replayAnswers(l.eng, nil)
	}
	if err != nil {
		return err
	}
	if err := l.replayAnswers(l.eng, nil); err != nil {
		return err
	}
	l.lastAlarms = l.eng.Alarms()
	var src serviceSource
	if json.Unmarshal(c.Manifest.Source, &src) == nil && src.Skip != nil {
		l.skip = src.Skip
	}
	l.lastCk = c.Info
	l.lastCkTime = c.Manifest.Created
	l.cfg.Log.Info("restored checkpoint", "version", c.Manifest.Version, "events", c.Manifest.Events, "position", positionsText(c.Manifest.Positions))
	l.setCatchUp()
	return nil
}

// adoptHint ends the error of a checkpoint taken under another configuration.
const adoptHint = "start with the same settings, or point --data at another directory"

// setCatchUp records the positions the engine must reach to be ready: what
// the source holds now.
func (l *loop) setCatchUp() {
	l.ready.Store(false)
	l.caughtUp, l.availKnown = l.src.Available()
	if l.availKnown {
		l.checkReady()
	}
}

// refreshCatchUp learns what the source holds once it can say (Kafka: once
// the brokers answer), then checks readiness.
func (l *loop) refreshCatchUp() {
	if !l.availKnown {
		l.caughtUp, l.availKnown = l.src.Available()
	}
	if l.availKnown {
		l.checkReady()
	}
}

func (l *loop) checkReady() {
	if l.ready.Load() {
		return
	}
	if l.group != nil && !l.group.joined {
		return // owns nothing yet
	}
	for _, p := range l.caughtUp {
		if l.group != nil && !l.group.owns(p.Partition) {
			continue // another instance's
		}
		if !l.eng.Covers(p) {
			return
		}
	}
	l.ready.Store(true)
	l.cfg.Log.Info("ready: caught up with the stream", "events", l.eng.Applied())
}

// startSource starts reading the stream after the positions the engine covers.
func (l *loop) startSource() {
	l.stopSource()
	l.generation++
	gen := l.generation
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	l.sourceMu.Lock()
	l.sourceStop, l.sourceDone = cancel, done
	l.sourceMu.Unlock()
	items := l.items
	mapper := l.mapper()
	go func() {
		defer close(done)
		err := l.src.Run(ctx, l.eng.Positions(), func(pos learner.Position, value []byte) bool {
			it := item{gen: gen, pos: pos, data: value}
			decodeMapped(&it, mapper)
			select {
			case items <- it:
				return true
			case <-ctx.Done():
				return false
			}
		})
		if err == nil || ctx.Err() != nil {
			return
		}
		var d *intake.DamageError
		switch {
		case errors.As(err, &d):
			l.damaged(d)
		case errors.Is(err, intake.ErrJournalCorrupt):
			l.setFault(&fault{kind: faultDamage, message: fmt.Sprintf("the journal cannot be read: %v. Intake has stopped and new events are refused; "+
				"put back the journal's files and restart", err)})
		default:
			l.setFault(&fault{kind: faultSource, message: fmt.Sprintf("intake from %v stopped: %v; restart the service once the cause is fixed", l.src, err)})
		}
	}()
}

// mapper returns a mapper of the configured fields for the source's
// goroutines, or nil when events need none: without a mapping, and for a history file,
// which maps its own lines (intake.History).
func (l *loop) mapper() *intake.Mapper {
	if !l.cfg.Fields.Mapped() {
		return nil
	}
	if _, ok := l.src.(*intake.HistorySource); ok {
		return nil
	}
	m, _ := intake.NewMapper(l.cfg.Fields) // validated with the configuration
	return m
}

func (l *loop) stopSource() {
	l.sourceMu.Lock()
	stop, done := l.sourceStop, l.sourceDone
	l.sourceStop, l.sourceDone = nil, nil
	l.sourceMu.Unlock()
	if stop != nil {
		stop()
		// Until it stops, the source may still hand over its partitions
		// (group mode): that work is done here, and events are dropped.
		for {
			select {
			case <-done:
				return
			case it := <-l.items:
				if it.ctl != nil {
					it.ctl(l)
				} else if it.ev != nil {
					eventPool.Put(it.ev)
				}
			}
		}
	}
}

// loop owns the engine.
func (l *loop) run(ctx context.Context) error {
	l.items = make(chan item, 1024)
	l.startSource()
	tick := time.NewTicker(l.cfg.PublishEvery)
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case it := <-l.items:
			if it.ctl != nil {
				it.ctl(l)
				continue
			}
			if it.gen != l.generation || (l.group != nil && !l.group.owns(it.pos.Partition)) {
				// read before a restore moved the position, or after the
				// partition was given up
				if it.ev != nil {
					eventPool.Put(it.ev)
				}
				continue
			}
			l.apply(it)
			if it.ev != nil {
				eventPool.Put(it.ev)
			}
			if l.sinceCk >= l.cfg.CheckpointEvery {
				if err := l.checkpoint(checkpoint.Periodic, 0); err != nil {
					l.cfg.Log.Error("periodic checkpoint failed; will retry", "error", err)
					l.sinceCk = 0
				}
			}
		case cmd := <-l.cmds:
			cmd.reply <- cmd.run(l)
		case <-tick.C:
			if l.fault.Load() == nil {
				l.vanished(l.src.Health())
			}
			if l.sinceCk > 0 && time.Since(l.lastCkTime) >= l.cfg.CheckpointInterval {
				if err := l.checkpoint(checkpoint.Periodic, 0); err != nil {
					l.cfg.Log.Error("timed checkpoint failed; will retry", "error", err)
				}
			}
			l.refreshCatchUp()
			l.publish()
		}
	}
}

// apply runs one event through the engine (or past it, for a skip rule).
func (l *loop) apply(it item) {
	if l.eng.Covers(it.pos) {
		l.eng.Apply(it.pos, &learner.Event{}) // counts the redelivery; changes nothing else
		return
	}
	defer l.checkReady()
	skip := l.skipFor(it.pos.Partition)
	if skip != nil && skip.coversPosition(it.pos) {
		l.eng.Pass(it.pos)
		l.afterEvent(it.pos)
		return
	}
	if it.decErr != nil {
		l.eng.Skip(it.pos)
		l.metrics.rejections.WithLabelValues("decode").Inc()
		l.dead.add(it.pos, it.decErr, it.data)
		l.notes.rejected(RejectionNote{Position: it.pos, Reason: Plain(it.decErr.Error()), At: time.Now().UTC()})
		l.afterEvent(it.pos)
		return
	}
	ev := it.ev
	if skip != nil && skip.coversEvent(it.pos, ev) {
		l.eng.Pass(it.pos)
		l.afterEvent(it.pos)
		return
	}
	if _, err := l.eng.Apply(it.pos, ev); err != nil {
		reason := "other"
		if rj := (*learner.Rejection)(nil); errors.As(err, &rj) {
			reason = rj.Kind.String()
		}
		l.metrics.rejected(reason).Inc()
		l.dead.add(it.pos, err, it.data)
		l.notes.rejected(RejectionNote{Position: it.pos, Reason: Plain(err.Error()), At: time.Now().UTC()})
	} else if a := l.eng.Alarms(); a != l.lastAlarms {
		l.lastAlarms = a
		l.noteAlarms(it.pos, ev)
		l.pinBeforeAlarm(it.pos.Partition)
	}
	l.afterEvent(it.pos)
}

// noteAlarms records, for the page, the alarms the event at pos raised:
// those of the learners whose alarm count grew.
func (l *loop) noteAlarms(pos learner.Position, ev *learner.Event) {
	if len(l.alarmCounts) != len(l.cfg.Engine.Learners) {
		l.alarmCounts = make([]int64, len(l.cfg.Engine.Learners))
	}
	for i, spec := range l.cfg.Engine.Learners {
		n := l.eng.LearnerAlarms(i)
		raised := n > l.alarmCounts[i]
		l.alarmCounts[i] = n
		if raised {
			n := AlarmNote{Learner: spec.Name, Key: ev.Key, Position: pos}
			if ev.HasTime {
				t := time.Unix(0, ev.Time).UTC()
				n.Time = &t
			}
			l.notes.alarm(n)
		}
	}
}

// skipFor returns the skip rule of a restore that applies to partition p:
// in a consumer group each partition has its own.
func (l *loop) skipFor(p int32) *skipRule {
	if l.group != nil {
		if ps := l.group.owned[p]; ps != nil {
			return ps.skip
		}
		return nil
	}
	return l.skip
}

func (l *loop) afterEvent(pos learner.Position) {
	l.sinceCk++
	l.handled.Add(1)
	if skip := l.skipFor(pos.Partition); skip != nil && skip.done(l.eng) {
		l.cfg.Log.Info("restore: the skipped range is behind; back to normal intake", "partition", pos.Partition)
		if l.group != nil {
			l.group.owned[pos.Partition].skip = nil
		} else {
			l.skip = nil
		}
	}
	// A curve point when the applied count reaches a multiple of CurveEvery:
	// once, not again for every rejected or passed event while the count
	// stays there (each point reports over every key).
	if n := l.eng.Applied(); n%l.cfg.CurveEvery == 0 && n > 0 && n != l.curveAt {
		l.curveAt = n
		l.curves.add(l.eng)
	}
}

// pinBeforeAlarm pins the newest checkpoint, taken before the alarm, so that
// retention keeps a state from before the drift: in a consumer group, the
// newest of the partition the alarm came from.
func (l *loop) pinBeforeAlarm(partition int32) {
	store, last := l.store, l.lastCk
	if l.group != nil {
		ps := l.group.owned[partition]
		if ps == nil {
			return
		}
		store, last = ps.store, ps.last
	}
	if last.Version == 0 {
		return
	}
	if err := store.PinFor(last.Version, "drift"); err != nil {
		l.cfg.Log.Error("could not pin the checkpoint before a drift alarm", "version", last.Version, "error", err)
		return
	}
	l.cfg.Log.Warn("drift alarm: pinned the checkpoint taken before it", "version", last.Version, "dir", store.Dir())
	// Keep the newest MaxDriftPins automatic pins: a stream that alarms
	// often would otherwise pin without end. An operator's pins stay.
	pins, err := store.Pins()
	if err != nil {
		return
	}
	var drift []uint64
	for v, why := range pins {
		if why == "drift" {
			drift = append(drift, v)
		}
	}
	slices.Sort(drift)
	for len(drift) > l.cfg.MaxDriftPins {
		store.Unpin(drift[0])
		drift = drift[1:]
	}
}

// checkpoint writes the engine's state; parent 0 means the last checkpoint.
// In a consumer group it writes each owned partition that changed.
func (l *loop) checkpoint(reason checkpoint.Reason, parent uint64) error {
	if l.group != nil {
		_, err := l.checkpointParts(reason, false)
		return err
	}
	if parent == 0 {
		parent = l.lastCk.Version
	}
	info, err := persist.Save(l.store, l.eng, reason, parent, serviceSource{Kind: "service", Skip: l.skip, Answers: answerCoverage(l.eng, nil)})
	if err != nil {
		l.metrics.checkpointFailures.Inc()
		return err
	}
	l.lastCk, l.sinceCk, l.lastCkTime = info, 0, time.Now()
	l.ckPositions[info.Version] = l.eng.Positions()
	l.cfg.Log.Info("checkpoint", "version", info.Version, "reason", reason, "events", info.Events, "bytes", info.Bytes)
	l.afterCheckpoint()
	return nil
}

// curvesPath is where the curves are kept between runs.
func (l *loop) curvesPath() string { return filepath.Join(l.cfg.DataDir, "curves.json") }

// afterCheckpoint tells the source what the checkpoints cover: the newest
// (Kafka commits it) and the oldest retained (the journal deletes what
// precedes it), flushes the dead letters, and keeps the curves.
func (l *loop) afterCheckpoint() {
	if err := save(l.curvesPath(), l.curves, l.notes); err != nil {
		l.cfg.Log.Warn("the error curves could not be saved; a restart starts them again", "error", err)
	}
	if err := l.dead.flush(); err != nil {
		l.cfg.Log.Error("dead letters: flush failed", "error", err)
	}
	l.trimAnswerLogs(l.store, nil)
	l.src.Checkpointed(l.eng.Positions(), l.oldestRetained())
}

// oldestRetained returns, per partition, the lowest position any retained
// checkpoint covers (0 where one of them covers nothing of a partition).
// Positions of checkpoints are remembered as they are written; others (from
// before a restart) are read from their manifests once.
func (l *loop) oldestRetained() []learner.Position {
	vs, err := l.store.Versions()
	if err != nil {
		return nil
	}
	var held [][]learner.Position
	parts := map[int32]bool{}
	for _, v := range vs {
		ps, ok := l.ckPositions[v]
		if !ok {
			m, err := l.store.ReadManifest(v)
			if err != nil {
				continue // a corrupt file protects nothing
			}
			for _, p := range m.Positions {
				ps = append(ps, learner.Position{Partition: p.Partition, Offset: p.Offset})
			}
			l.ckPositions[v] = ps
		}
		held = append(held, ps)
		for _, p := range ps {
			parts[p.Partition] = true
		}
	}
	for v := range l.ckPositions {
		if !slices.Contains(vs, v) {
			delete(l.ckPositions, v)
		}
	}
	out := make([]learner.Position, 0, len(parts))
	for p := range parts {
		low := int64(-1)
		for _, ps := range held {
			off := int64(0) // a checkpoint without the partition covers none of it
			for _, q := range ps {
				if q.Partition == p {
					off = q.Offset
				}
			}
			if low < 0 || off < low {
				low = off
			}
		}
		out = append(out, learner.Position{Partition: p, Offset: low})
	}
	slices.SortFunc(out, func(a, b learner.Position) int { return int(a.Partition - b.Partition) })
	return out
}

// publish makes the engine's current state and the service's status visible
// to readers. The engine is copied only when it changed since the last
// snapshot; the status (readiness, fault, the source's health and lag, dead
// letters, the checkpoint listing) is read afresh each time.
func (l *loop) publish() {
	cur := l.snap.Load()
	var state *stateView
	if cur != nil && cur.state.current(l.eng, l.lastCk) {
		state = cur.state
	} else {
		state = newStateView(l.eng, l.lastCk)
	}
	snap := &snapshot{state: state, ready: l.ready.Load(), fault: l.fault.Load(), dead: l.dead.count(), at: time.Now()}
	var outage *intake.Outage
	if err := l.src.Health(); errors.As(err, &outage) {
		snap.outage = outage
	}
	if k, ok := l.src.(interface{ Connected() (bool, time.Time) }); ok { // sources that connect to something
		up, _ := k.Connected()
		snap.connected = &up
	}
	applied := map[int32]int64{}
	for _, p := range state.eng.Positions() {
		applied[p.Partition] = p.Offset
	}
	last, _ := l.src.Available()
	for _, a := range last {
		if l.group != nil && !l.group.owns(a.Partition) {
			continue
		}
		snap.lag = append(snap.lag, learner.Position{Partition: a.Partition, Offset: max(0, a.Offset-applied[a.Partition])})
	}
	if l.group != nil {
		snap.group = l.groupView(state, last)
		snap.checkpoints = l.groupCheckpoints()
	} else if list, err := l.store.List(); err == nil {
		snap.checkpoints = list
	} else if cur != nil {
		snap.checkpoints = cur.checkpoints
	}
	l.snap.Store(snap)
	if cur != nil && cur.state != state {
		// Readers now find the new copy; those still reading the old one
		// hold it until they are done.
		cur.state.eng.Release()
	}
}

// do runs f on the loop and waits for its result.
func (l *loop) do(f func(l *loop) cmdResult) cmdResult {
	c := command{run: f, reply: make(chan cmdResult, 1)}
	l.cmds <- c
	return <-c.reply
}

// restore sets the engine back to version v and resumes as asked. It runs
// on the loop.
func (l *loop) restore(v uint64, req RestoreRequest) cmdResult {
	if l.group != nil {
		return l.restorePartition(v, req)
	}
	live := l.eng.Positions()
	mode, rule, err := req.rule(live)
	if err != nil {
		return cmdResult{err: cmdErr(ErrInvalidRequest, "%v", err)}
	}
	failsChecks := func(err error) cmdResult {
		msg := fmt.Sprintf("checkpoint %d fails its checks and cannot be restored: %v", v, err)
		if good, _, lerr := l.store.Latest(); lerr == nil {
			msg += fmt.Sprintf("; the newest good version is %d", good.Manifest.Version)
		}
		return cmdResult{err: cmdErr(ErrConflict, "%s", msg).withCause(err)}
	}
	// The restored state is built beside the live one and becomes live only
	// once the checkpoint recording it is durable: a restore happens as a
	// whole or not at all.
	eng, res := l.readForRestore(l.store, v, rule,
		cmdErr(ErrNoCheckpoint, "checkpoint %d does not exist; GET /v1/checkpoints lists them", v), failsChecks)
	if eng == nil {
		return res
	}
	if mode == ResumeFromNow {
		eng.CoverUpTo(live)
	}
	if err := l.replayAnswers(eng, nil); err != nil {
		return cmdResult{err: cmdErr(ErrNotStored, "restore of checkpoint %d not done: the answers served since cannot be read back (%v); "+
			"the service goes on from its state before this request", v, err).withCause(err)}
	}
	prevEng, prevSkip, prevAlarms, prevCurveAt := l.eng, l.skip, l.lastAlarms, l.curveAt
	l.eng, l.skip, l.lastAlarms, l.curveAt = eng, nil, eng.Alarms(), eng.Applied()
	if mode == ResumeSkip {
		l.skip = rule
	}
	if err := l.checkpoint(checkpoint.Restore, v); err != nil {
		l.eng, l.skip, l.lastAlarms, l.curveAt = prevEng, prevSkip, prevAlarms, prevCurveAt
		l.cfg.Log.Error("restore not done: the checkpoint recording it could not be written; the state is unchanged", "version", v, "error", err)
		return cmdResult{err: cmdErr(ErrNotStored, "restore of checkpoint %d not done: the checkpoint recording it could not be written (%v); "+
			"the service goes on from its state before this request", v, err).withCause(err)}
	}
	info := l.lastCk
	l.curves.trim(eng.Applied())
	l.cfg.Log.Warn("restored", "version", v, "resume", mode.String())
	l.setCatchUp()
	l.startSource()
	l.publish()
	return cmdResult{info: info}
}

// readForRestore reads version v of store into a new engine, as it
// decodes (the file's CRC-32C and state digest are known at its end, before
// the state is kept), after refusing a skip whose range the checkpoint
// already holds (skipReaches). On failure the engine is nil and the result
// says why: missing when there is no such version, failed(err) when the
// file fails its checks.
func (l *loop) readForRestore(store *checkpoint.Store, v uint64, rule *skipRule, missing *cmdError, failed func(error) cmdResult) (*learner.Engine, cmdResult) {
	st, err := store.Stream(v)
	if errors.Is(err, checkpoint.ErrNotFound) {
		return nil, cmdResult{err: missing}
	}
	if err != nil {
		return nil, failed(err)
	}
	list, _ := store.List()
	if err := skipReaches(st.Manifest, rule, list); err != nil {
		st.Close()
		return nil, cmdResult{err: err}
	}
	eng, err := learner.NewEngine(l.eng.Config())
	if err != nil {
		st.Close()
		return nil, cmdResult{err: err}
	}
	if err := persist.AdoptStream(eng, st, adoptHint); errors.Is(err, checkpoint.ErrCorrupt) {
		return nil, failed(err)
	} else if err != nil {
		return nil, cmdResult{err: err}
	}
	return eng, cmdResult{}
}

// setFault records f unless a fault already holds; it logs and counts it.
func (l *loop) setFault(f *fault) {
	f.since = time.Now()
	if !l.fault.CompareAndSwap(nil, f) {
		return
	}
	l.metrics.faults.WithLabelValues(f.kind).Inc()
	l.cfg.Log.Error("intake stopped", "fault", f.kind, "message", f.message)
}

// vanished turns a journal error into the vanished fault when it is one.
func (l *loop) vanished(err error) bool {
	if !errors.Is(err, intake.ErrJournalVanished) {
		return false
	}
	l.setFault(&fault{kind: faultVanished, message: "the data directory's journal files have vanished (was the directory removed or moved?): " +
		"nothing can be stored, so events are refused; put the directory back and restart the service"})
	return true
}

// damaged records the damage fault for what the journal reader met.
func (l *loop) damaged(d *intake.DamageError) {
	l.setFault(&fault{kind: faultDamage, damage: d, message: fmt.Sprintf(
		"the journal is damaged: %s at byte %d; the events at offsets %d to %d cannot be read. Intake has stopped and new events are refused. "+
			"To go on without those %d events, POST /v1/intake/skip-damaged with {\"from\":%d,\"to\":%d}; or put back the segment from a copy and restart",
		d.Segment, d.Byte, d.From, d.To-1, d.To-d.From, d.From, d.To)})
}

// skipDamaged passes over the offsets a damaged journal lost and restarts
// intake after them. It runs on the loop.
func (l *loop) skipDamaged(req SkipDamagedRequest) cmdResult {
	f := l.fault.Load()
	if f == nil || f.kind != faultDamage {
		return cmdResult{err: cmdErr(ErrConflict, "intake is not stopped by journal damage; nothing to skip")}
	}
	d := f.damage
	if req.From != d.From || req.To != d.To {
		return cmdResult{err: cmdErr(ErrConflict, "the damage loses offsets %d to %d: send {\"from\":%d,\"to\":%d} exactly, to say you give up those events", d.From, d.To-1, d.From, d.To)}
	}
	l.stopSource()
	for off := d.From; off < d.To; off++ {
		l.eng.Pass(learner.Position{Partition: 0, Offset: off})
	}
	l.metrics.lost.Add(float64(d.To - d.From))
	l.cfg.Log.Warn("journal damage skipped on the operator's request; these events are lost", "from", d.From, "to", d.To-1)
	l.fault.Store(nil)
	res := cmdResult{info: l.lastCk}
	if err := l.checkpoint(checkpoint.Manual, 0); err != nil {
		l.cfg.Log.Error("could not checkpoint after skipping journal damage; a restart meets the damage again", "error", err)
	} else {
		res.info = l.lastCk
	}
	l.setCatchUp()
	l.startSource()
	l.publish()
	return res
}
