package api

import (
	"strings"
	"time"

	"tidemark/checkpoint"
	"tidemark/learner"
)

// snapshot is everything HTTP handlers, metrics and the page read: an
// immutable view the loop publishes at most every PublishEvery (and after
// each command). Readers never touch the live engine, the source or the
// store; the status fields are what the loop saw when it published.
type snapshot struct {
	state *stateView // the engine as of the snapshot; shared by snapshots until the engine changes

	ready       bool               // restored and caught up with the source
	fault       *fault             // what stopped intake, or nil
	outage      error              // the source's transient failure (*intake.Outage), or nil
	connected   *bool              // whether the source reaches what it reads from; nil when it reaches nothing (journal, file)
	lag         []learner.Position // per partition, events the state has not applied (Offset holds the count)
	dead        int64              // dead letters written since start
	checkpoints []checkpoint.Info  // the store's listing, oldest first
	group       *InstanceView      // in a consumer group: this instance and its partitions; else nil
	at          time.Time
}

// stateView is a published copy of the engine (learner.Engine.Publish: it
// shares the keys that have not changed since), its report without keys and
// the checkpoint it descends from.
type stateView struct {
	eng       *learner.Engine // predicts and reports for any number of requests at once
	report    learner.Report  // per-key figures are computed on request, from eng
	ck        checkpoint.Info
	ckVersion uint64
	applied   int64
	served    int64 // the engine's ServedChanges
	positions string
}

// newStateView publishes eng. The copy is held once, by the loop, until a
// newer one replaces it in the snapshot (loop.publish releases it); readers
// of its keys hold it while they read (Service.holdState), so that the
// engine may reuse the storage of versions no held copy shows.
func newStateView(eng *learner.Engine, ck checkpoint.Info) *stateView {
	eng.RecycleReleased()
	pub := eng.Publish()
	return &stateView{eng: pub, report: pub.Report(false), ck: ck, ckVersion: ck.Version, applied: eng.Applied(),
		positions: positionsKey(eng), served: eng.ServedChanges()}
}

// current reports whether v still shows eng and ck.
func (v *stateView) current(eng *learner.Engine, ck checkpoint.Info) bool {
	return v != nil && v.applied == eng.Applied() && v.positions == positionsKey(eng) && v.ckVersion == ck.Version && v.served == eng.ServedChanges()
}

func positionsKey(eng *learner.Engine) string {
	var b strings.Builder
	for _, p := range eng.Positions() {
		b.WriteString(p.String())
		b.WriteByte(' ')
	}
	return b.String()
}

func (v *stateView) predict(key, name string, ev *learner.Event) (learner.Prediction, error) {
	return v.eng.Predict(key, name, ev)
}

// lagTotal returns the events waiting over all partitions.
func (s *snapshot) lagTotal() int64 {
	var n int64
	for _, l := range s.lag {
		n += l.Offset
	}
	return n
}

// holdState returns the current snapshot with its copy of the engine held
// for reading keys; the caller releases it (snap.state.eng.Release). A copy
// the loop has just replaced cannot be held any more: then the newer one is.
func (s *Service) holdState() *snapshot {
	for {
		snap := s.snap.Load()
		if snap.state.eng.Acquire() {
			return snap
		}
	}
}
