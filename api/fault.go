package api

import (
	"errors"
	"fmt"
	"net/http"
	"time"

	"github.com/labstack/echo/v4"

	"tidemark/api/intake"
	"tidemark/checkpoint"
	"tidemark/learner"
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

// setFault records f unless a fault already holds; it logs and counts it.
func (s *Service) setFault(f *fault) {
	f.since = time.Now()
	if !s.fault.CompareAndSwap(nil, f) {
		return
	}
	s.metrics.faults.WithLabelValues(f.kind).Inc()
	s.cfg.Log.Error("intake stopped", "fault", f.kind, "message", f.message)
}

// vanished turns a journal error into the vanished fault when it is one.
func (s *Service) vanished(err error) bool {
	if !errors.Is(err, intake.ErrJournalVanished) {
		return false
	}
	s.setFault(&fault{kind: faultVanished, message: "the data directory's journal files have vanished (was the directory removed or moved?): " +
		"nothing can be stored, so events are refused; put the directory back and restart the service"})
	return true
}

// damaged records the damage fault for what the journal reader met.
func (s *Service) damaged(d *intake.DamageError) {
	s.setFault(&fault{kind: faultDamage, damage: d, message: fmt.Sprintf(
		"the journal is damaged: %s at byte %d; the events at offsets %d to %d cannot be read. Intake has stopped and new events are refused. "+
			"To go on without those %d events, POST /v1/intake/skip-damaged with {\"from\":%d,\"to\":%d}; or put back the segment from a copy and restart",
		d.Segment, d.Byte, d.From, d.To-1, d.To-d.From, d.From, d.To)})
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
	res := s.do(func(s *Service) cmdResult { return s.skipDamaged(req) })
	if res.err != nil {
		return httpErr(res.code, "%v", res.err)
	}
	return c.JSON(http.StatusOK, SkipDamagedResult{Skipped: req.To - req.From, From: req.From, To: req.To, Checkpoint: res.info})
}

// skipDamaged passes over the offsets a damaged journal lost and restarts
// intake after them. It runs on the loop.
func (s *Service) skipDamaged(req SkipDamagedRequest) cmdResult {
	f := s.fault.Load()
	if f == nil || f.kind != faultDamage {
		return cmdResult{err: errors.New("intake is not stopped by journal damage; nothing to skip"), code: http.StatusConflict}
	}
	d := f.damage
	if req.From != d.From || req.To != d.To {
		return cmdResult{err: fmt.Errorf("the damage loses offsets %d to %d: send {\"from\":%d,\"to\":%d} exactly, to say you give up those events", d.From, d.To-1, d.From, d.To),
			code: http.StatusConflict}
	}
	s.stopSource()
	for off := d.From; off < d.To; off++ {
		s.eng.Pass(learner.Position{Partition: 0, Offset: off})
	}
	s.metrics.lost.Add(float64(d.To - d.From))
	s.cfg.Log.Warn("journal damage skipped on the operator's request; these events are lost", "from", d.From, "to", d.To-1)
	s.fault.Store(nil)
	res := cmdResult{info: s.lastCk}
	if err := s.checkpoint(checkpoint.Manual, 0); err != nil {
		s.cfg.Log.Error("could not checkpoint after skipping journal damage; a restart meets the damage again", "error", err)
	} else {
		res.info = s.lastCk
	}
	s.setCatchUp()
	s.startSource()
	s.publish()
	return res
}
