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
	// Partition names the partition to restore in a consumer group, where
	// each partition has its own checkpoints (and versions); absent
	// otherwise.
	Partition *int32 `json:"partition,omitempty"`
	Resume    string `json:"resume"`
	// DryRun answers how many events the restore would replay, leave out
	// (skip) or forget (from_now), and changes nothing.
	DryRun        bool            `json:"dry_run,omitempty"`
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

// RestoreResult is what a restore answers.
type RestoreResult struct {
	Restored   uint64             `json:"restored"`
	Resume     string             `json:"resume"`
	Checkpoint checkpoint.Info    `json:"checkpoint"` // taken at once, recording the restore
	Position   []learner.Position `json:"position"`
}

// skipReaches refuses a skip that cannot leave out what it names because
// checkpoint m's state already holds some of it: a time range that begins at
// or before the latest event time m applied, or a position range that begins
// at or before m's position in its partition. The answer names what the
// operator probably meant: the newest checkpoint of list from before the
// range.
func skipReaches(m checkpoint.Manifest, rule *skipRule, list []checkpoint.Info) error {
	if rule == nil {
		return nil
	}
	if rule.HasTime && m.EventTimes != nil && rule.FromTime <= m.EventTimes.Last.UnixNano() {
		from := time.Unix(0, rule.FromTime).UTC()
		var best *checkpoint.Info
		for i, in := range list {
			if in.Error == "" && in.EventTimes != nil && in.EventTimes.Last.Before(from) && (best == nil || in.Version > best.Version) {
				best = &list[i]
			}
		}
		msg := fmt.Sprintf("checkpoint %d already holds events up to %s, at or after skip_from_time %s: the range's events in its state cannot be skipped",
			m.Version, m.EventTimes.Last.Format(time.RFC3339), from.Format(time.RFC3339))
		if best != nil {
			msg += fmt.Sprintf("; restore a checkpoint from before the range — version %d is the newest (its events end at %s)", best.Version, best.EventTimes.Last.Format(time.RFC3339))
		} else {
			msg += "; no checkpoint kept ends before the range"
		}
		return cmdErr(ErrConflict, "%s", msg)
	}
	for _, pr := range rule.Positions {
		for _, p := range m.Positions {
			if p.Partition != pr.Partition || pr.From > p.Offset {
				continue
			}
			var best *checkpoint.Info
			for i, in := range list {
				for _, q := range in.Position {
					if in.Error == "" && q.Partition == pr.Partition && q.Offset < pr.From && (best == nil || in.Version > best.Version) {
						best = &list[i]
					}
				}
			}
			msg := fmt.Sprintf("checkpoint %d already holds partition %d up to offset %d, at or after the skip range's start %d: what it holds cannot be skipped",
				m.Version, p.Partition, p.Offset, pr.From)
			if best != nil {
				msg += fmt.Sprintf("; restore a checkpoint from before the range — version %d is the newest", best.Version)
			}
			return cmdErr(ErrConflict, "%s", msg)
		}
	}
	return nil
}

// RestorePreview answers a restore's dry run: what it would do, counted on
// the source's events after the checkpoint up to the live position.
type RestorePreview struct {
	DryRun  bool               `json:"dry_run"` // always true: nothing was changed
	Restore uint64             `json:"restore"`
	Resume  string             `json:"resume"`
	From    []learner.Position `json:"from"` // what the checkpoint covers
	To      []learner.Position `json:"to"`   // the live position
	Replay  int64              `json:"replay"`
	Skip    int64              `json:"skip"`
	Forget  int64              `json:"forget"` // from_now: the events after the checkpoint, left out for good
}
