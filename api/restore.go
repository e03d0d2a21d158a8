package api

import (
	"errors"
	"fmt"
	"time"

	"tidemark/checkpoint"
	"tidemark/learner"
)

// ResumeMode says how intake resumes after a restore (DESIGN.md, "Restore").
type ResumeMode int

// Resume modes.
const (
	// ResumeFromCheckpoint replays every event after the checkpoint's position.
	ResumeFromCheckpoint ResumeMode = iota + 1
	// ResumeFromNow keeps the live position: what came after the checkpoint is forgotten.
	ResumeFromNow
	// ResumeSkip replays after the checkpoint but passes over a range of event
	// times or positions.
	ResumeSkip
)

func (m ResumeMode) String() string {
	switch m {
	case ResumeFromCheckpoint:
		return "from_checkpoint"
	case ResumeFromNow:
		return "from_now"
	case ResumeSkip:
		return "skip"
	}
	return fmt.Sprintf("ResumeMode(%d)", int(m))
}

// ParseResumeMode parses from_checkpoint, from_now or skip.
func ParseResumeMode(s string) (ResumeMode, error) {
	for _, m := range []ResumeMode{ResumeFromCheckpoint, ResumeFromNow, ResumeSkip} {
		if m.String() == s {
			return m, nil
		}
	}
	return 0, fmt.Errorf("resume %q: want from_checkpoint, from_now or skip", s)
}

// PositionRange is a range of offsets in one partition, from inclusive, to exclusive.
type PositionRange struct {
	Partition int32 `json:"partition"`
	From      int64 `json:"from"`
	To        int64 `json:"to"`
}

// RestoreRequest is the body of POST /v1/checkpoints/{version}/restore.
type RestoreRequest struct {
	Resume        string          `json:"resume"`
	SkipFromTime  string          `json:"skip_from_time,omitempty"` // RFC 3339, inclusive
	SkipToTime    string          `json:"skip_to_time,omitempty"`   // RFC 3339, exclusive
	SkipPositions []PositionRange `json:"skip_positions,omitempty"`
}

// skipRule passes over the events of a bad burst while the engine catches up
// after a restore. It applies only to positions the live stream had reached
// when the restore was asked for (Until): events that arrive later are
// learned whatever their time. It is saved in checkpoint manifests while
// active, so a crash during the catch-up does not bring the burst back.
type skipRule struct {
	FromTime  int64              `json:"from_time,omitempty"` // Unix ns, inclusive
	ToTime    int64              `json:"to_time,omitempty"`   // exclusive
	HasTime   bool               `json:"has_time,omitempty"`
	Positions []PositionRange    `json:"positions,omitempty"`
	Until     []learner.Position `json:"until"`
}

func (r *skipRule) inScope(pos learner.Position) bool {
	for _, u := range r.Until {
		if u.Partition == pos.Partition {
			return pos.Offset <= u.Offset
		}
	}
	return false
}

func (r *skipRule) coversPosition(pos learner.Position) bool {
	if !r.inScope(pos) {
		return false
	}
	for _, pr := range r.Positions {
		if pr.Partition == pos.Partition && pos.Offset >= pr.From && pos.Offset < pr.To {
			return true
		}
	}
	return false
}

func (r *skipRule) coversEvent(pos learner.Position, ev *learner.Event) bool {
	return r.HasTime && r.inScope(pos) && ev.HasTime && ev.Time >= r.FromTime && ev.Time < r.ToTime
}

// done reports whether the engine has passed every position in scope.
func (r *skipRule) done(eng *learner.Engine) bool {
	for _, u := range r.Until {
		if !eng.Covers(u) {
			return false
		}
	}
	return true
}

func (req *RestoreRequest) rule(live []learner.Position) (ResumeMode, *skipRule, error) {
	mode, err := ParseResumeMode(req.Resume)
	if err != nil {
		return 0, nil, err
	}
	hasRange := req.SkipFromTime != "" || req.SkipToTime != "" || len(req.SkipPositions) > 0
	if mode != ResumeSkip {
		if hasRange {
			return 0, nil, fmt.Errorf("skip ranges are given but resume is %s; use \"resume\":\"skip\"", mode)
		}
		return mode, nil, nil
	}
	if !hasRange {
		return 0, nil, errors.New("resume skip needs skip_from_time and skip_to_time, or skip_positions")
	}
	r := &skipRule{Positions: req.SkipPositions, Until: live}
	if req.SkipFromTime != "" || req.SkipToTime != "" {
		from, err1 := time.Parse(time.RFC3339Nano, req.SkipFromTime)
		to, err2 := time.Parse(time.RFC3339Nano, req.SkipToTime)
		if err1 != nil || err2 != nil {
			return 0, nil, errors.New("skip_from_time and skip_to_time must both be RFC 3339 times, e.g. 2026-03-02T10:00:00Z")
		}
		if !from.Before(to) {
			return 0, nil, fmt.Errorf("skip_from_time %s is not before skip_to_time %s", req.SkipFromTime, req.SkipToTime)
		}
		r.FromTime, r.ToTime, r.HasTime = from.UnixNano(), to.UnixNano(), true
	}
	for _, pr := range req.SkipPositions {
		if pr.From >= pr.To {
			return 0, nil, fmt.Errorf("skip_positions: from %d is not before to %d in partition %d", pr.From, pr.To, pr.Partition)
		}
	}
	return mode, r, nil
}

// command is work the loop does for an HTTP handler.
type command struct {
	run   func(s *Service) cmdResult
	reply chan cmdResult
}

type cmdResult struct {
	info checkpoint.Info
	err  error
	code int // HTTP status for err
}

// do runs f on the loop and waits for its result.
func (s *Service) do(f func(s *Service) cmdResult) cmdResult {
	c := command{run: f, reply: make(chan cmdResult, 1)}
	s.cmds <- c
	return <-c.reply
}

// RestoreResult is what a restore answers.
type RestoreResult struct {
	Restored   uint64             `json:"restored"`
	Resume     string             `json:"resume"`
	Checkpoint checkpoint.Info    `json:"checkpoint"` // taken at once, recording the restore
	Position   []learner.Position `json:"position"`
}

// restore sets the engine back to version v and resumes as asked. It runs
// on the loop.
func (s *Service) restore(v uint64, req RestoreRequest) cmdResult {
	live := s.eng.Positions()
	mode, rule, err := req.rule(live)
	if err != nil {
		return cmdResult{err: err, code: 400}
	}
	c, err := s.store.Load(v)
	if errors.Is(err, checkpoint.ErrNotFound) {
		return cmdResult{err: fmt.Errorf("checkpoint %d does not exist; GET /v1/checkpoints lists them", v), code: 404}
	}
	if err != nil {
		msg := fmt.Sprintf("checkpoint %d fails its checks and cannot be restored: %v", v, err)
		if good, _, lerr := s.store.Latest(); lerr == nil {
			msg += fmt.Sprintf("; the newest good version is %d", good.Manifest.Version)
		}
		return cmdResult{err: errors.New(msg), code: 409}
	}
	// The restored state is built beside the live one and becomes live only
	// once the checkpoint recording it is durable: a restore happens as a
	// whole or not at all.
	eng, err := learner.NewEngine(s.eng.Config())
	if err != nil {
		return cmdResult{err: err, code: 500}
	}
	if err := s.decodeInto(eng, c); err != nil {
		return cmdResult{err: err, code: 409}
	}
	if mode == ResumeFromNow {
		eng.CoverUpTo(live)
	}
	prevEng, prevSkip, prevAlarms := s.eng, s.skip, s.lastAlarms
	s.eng, s.skip, s.lastAlarms = eng, nil, eng.Alarms()
	if mode == ResumeSkip {
		s.skip = rule
	}
	if err := s.checkpoint(checkpoint.Manual, v); err != nil {
		s.eng, s.skip, s.lastAlarms = prevEng, prevSkip, prevAlarms
		s.cfg.Log.Error("restore not done: the checkpoint recording it could not be written; the state is unchanged", "version", v, "error", err)
		return cmdResult{err: fmt.Errorf("restore of checkpoint %d not done: the checkpoint recording it could not be written (%v); "+
			"the service goes on from its state before this request", v, err), code: 503}
	}
	info := s.lastCk
	s.cfg.Log.Warn("restored", "version", v, "resume", mode.String())
	s.setCatchUp()
	s.startSource()
	s.publish()
	return cmdResult{info: info}
}
