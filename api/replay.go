package api

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"

	"tidemark/api/intake"
	"tidemark/learner"
)

// DefaultRejectLog is how many rejected lines Replay reports one by one
// before it only counts them.
const DefaultRejectLog = 20

// ErrStrict is returned by Replay in strict mode at the first rejected line.
var ErrStrict = errors.New("api: rejected line in strict mode")

// ReplayConfig configures Replay.
type ReplayConfig struct {
	// Strict stops at the first rejected line with an error wrapping ErrStrict.
	Strict bool
	// Log receives one line per rejected event, the first RejectLog of them,
	// then a count at the end. Nil discards them.
	Log io.Writer
	// RejectLog is the number of rejections logged one by one. Default: DefaultRejectLog.
	RejectLog int
}

// Replay runs every line of h through eng, test-then-train, in order. Each
// line's position is its line number in partition 0; positions the engine
// already covers (after a restore) are skipped by the engine. It returns when
// the history ends, ctx is done, or (strict) at the first rejection.
func Replay(ctx context.Context, h *intake.History, eng *learner.Engine, cfg ReplayConfig) error {
	if cfg.RejectLog == 0 {
		cfg.RejectLog = DefaultRejectLog
	}
	logged, rejected := 0, 0
	reject := func(line int64, err error) error {
		rejected++
		if cfg.Strict {
			return fmt.Errorf("%w: line %d: %v", ErrStrict, line, err)
		}
		if cfg.Log != nil && logged < cfg.RejectLog {
			fmt.Fprintf(cfg.Log, "line %d: %v\n", line, err)
			logged++
		}
		return nil
	}
	var ev learner.Event
	for n := 0; ; n++ {
		if n%4096 == 0 && ctx.Err() != nil {
			return ctx.Err()
		}
		line, no, err := h.Next()
		if err == io.EOF {
			break
		}
		pos := learner.Position{Partition: 0, Offset: no}
		if errors.Is(err, intake.ErrLineTooLong) {
			eng.Skip(pos)
			if err := reject(no, err); err != nil {
				return err
			}
			continue
		}
		if err != nil {
			return err
		}
		if len(bytes.TrimSpace(line)) == 0 {
			continue // blank lines carry no event
		}
		if eng.Covers(pos) {
			continue
		}
		if err := learner.DecodeEvent(line, &ev); err != nil {
			eng.Skip(pos)
			if err := reject(no, err); err != nil {
				return err
			}
			continue
		}
		if _, err := eng.Apply(pos, &ev); err != nil {
			if err := reject(no, err); err != nil {
				return err
			}
		}
	}
	if cfg.Log != nil && rejected > logged {
		fmt.Fprintf(cfg.Log, "%d rejected lines in all (%d shown)\n", rejected, logged)
	}
	return nil
}
