package api

import (
	"net/http"
	"time"

	"github.com/labstack/echo/v4"

	"tidemark/api/intake"
	"tidemark/checkpoint"
)

// Fault kinds: a condition of the data directory that stops intake. While a
// fault holds, /readyz answers 503 with its message, POST /v1/events refuses
// events with 503 (they could not be applied), and tidemark_intake_stopped
// is 1. Predictions go on from the last state.
const (
	// faultVanished: the journal's files are no longer in the data
	// directory (removed or moved). Nothing can be stored; /healthz fails too.
	// Only a restart with the directory back clears it.
	faultVanished = "vanished"
	// faultDamage: the journal reader met a damaged record. The operator
	// clears it by skipping exactly the lost offsets (POST
	// /v1/intake/skip-damaged) or by replacing the segment and restarting.
	faultDamage = "damage"
	// faultSource: the source stopped for another reason; a restart once
	// the cause is fixed clears it.
	faultSource = "source"
)

// fault is the condition that stopped intake.
type fault struct {
	kind    string
	message string
	since   time.Time
	damage  *intake.DamageError // for faultDamage
}

// SkipDamagedRequest is the body of POST /v1/intake/skip-damaged: the lost
// offsets exactly as the fault names them, from inclusive, to exclusive.
type SkipDamagedRequest struct {
	From int64 `json:"from"`
	To   int64 `json:"to"`
}

// SkipDamagedResult answers POST /v1/intake/skip-damaged.
type SkipDamagedResult struct {
	Skipped    int64           `json:"skipped"` // events given up
	From       int64           `json:"from"`
	To         int64           `json:"to"`
	Checkpoint checkpoint.Info `json:"checkpoint"` // recording the skip
}

func (s *Service) handleSkipDamaged(c echo.Context) error {
	var req SkipDamagedRequest
	if err := decodeJSONBody(c, &req); err != nil {
		return err
	}
	res := s.loop.do(func(l *loop) cmdResult { return l.skipDamaged(req) })
	if res.err != nil {
		return answer(res.err)
	}
	return c.JSON(http.StatusOK, SkipDamagedResult{Skipped: req.To - req.From, From: req.From, To: req.To, Checkpoint: res.info})
}
