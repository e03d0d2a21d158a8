package api

import (
	"fmt"
	"strings"
	"sync"
	"time"

	"tidemark/checkpoint"
	"tidemark/learner"
)

// snapshot is an immutable view of the engine that HTTP handlers read: a
// copy of the engine (predictions), its report (learners, metrics) and the
// checkpoint it descends from. The loop publishes a new one at most every
// PublishEvery; handlers never touch the live engine.
type snapshot struct {
	mu        sync.Mutex // the copy's learners keep scratch space: one predict at a time per snapshot
	eng       *learner.Engine
	report    learner.Report
	ck        checkpoint.Info
	ckVersion uint64
	applied   int64
	positions string
	ready     bool
	dead      int64
	at        time.Time
}

func newSnapshot(eng *learner.Engine, ck checkpoint.Info, ready bool, dead int64) *snapshot {
	return &snapshot{eng: eng.Clone(), report: eng.Report(true), ck: ck, ckVersion: ck.Version, applied: eng.Applied(),
		positions: positionsKey(eng), ready: ready, dead: dead, at: time.Now()}
}

func positionsKey(eng *learner.Engine) string {
	var b strings.Builder
	for _, p := range eng.Positions() {
		fmt.Fprintf(&b, "%d:%d ", p.Partition, p.Offset)
	}
	return b.String()
}

func (s *snapshot) predict(key, name string, ev *learner.Event) (learner.Prediction, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.eng.Predict(key, name, ev)
}
