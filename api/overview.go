package api

import (
	"cmp"
	"embed"
	"fmt"
	"net/http"
	"slices"
	"strconv"
	"time"

	"github.com/labstack/echo/v4"

	"tidemark/checkpoint"
	"tidemark/learner"
)

// The operators' page: a shell (page/) embedded in the binary, which draws
// itself from GET /v1/overview every two seconds and acts through the same
// endpoints as any client (restore, pin). Nothing is fetched from outside
// the service; the Content-Security-Policy says so to the browser.

//go:embed page/index.html page/page.js page/page.css
var pageFS embed.FS

const pageCSP = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; " +
	"form-action 'none'; base-uri 'none'; frame-ancestors 'none'"

func (s *Service) handlePage(c echo.Context) error {
	name := c.Param("asset")
	types := map[string]string{"": "text/html; charset=utf-8", "page.js": "text/javascript; charset=utf-8", "page.css": "text/css; charset=utf-8"}
	ctype, ok := types[name]
	if !ok {
		return httpErr(http.StatusNotFound, "no such page")
	}
	if name == "" {
		name = "index.html"
	}
	b, err := pageFS.ReadFile("page/" + name)
	if err != nil {
		return err
	}
	h := c.Response().Header()
	h.Set("Content-Security-Policy", pageCSP)
	h.Set("X-Content-Type-Options", "nosniff")
	h.Set("Cache-Control", "no-cache")
	return c.Blob(http.StatusOK, ctype, b)
}

// Overview is everything the page shows, in one answer.
type Overview struct {
	Status      OverviewStatus        `json:"status"`
	Learners    []OverviewLearner     `json:"learners"`         // by recent RMSE, best first; those without one last
	Leader      *learner.LeaderReport `json:"leader,omitempty"` // the per-key leader's figures, when kept
	Served      *learner.ServedReport `json:"served,omitempty"` // the answers served, scored against their labels, once any was served
	Alarms      []AlarmNote           `json:"alarms"`           // the latest drift alarms, oldest first
	Checkpoints []checkpoint.Info     `json:"checkpoints"`
	Rejections  []RejectionNote       `json:"rejections"` // the latest refused events, oldest first
	Settings    OverviewSettings      `json:"settings"`
	Caution     string                `json:"caution"`
}

// OverviewStatus is the intake's and the state's status.
type OverviewStatus struct {
	Source      string                `json:"source"`
	Ready       bool                  `json:"ready"`
	Message     string                `json:"message,omitempty"` // what stops or slows intake, if anything
	Positions   []learner.Position    `json:"positions"`
	Lag         int64                 `json:"lag"`
	Events      int64                 `json:"events"`
	Rejected    int64                 `json:"rejected"`
	Skipped     int64                 `json:"skipped"`
	Keys        int                   `json:"keys"`
	DeadLetters int64                 `json:"dead_letters"`
	Checkpoint  uint64                `json:"checkpoint_version"`
	EventTimes  *checkpoint.TimeRange `json:"event_times,omitempty"`
	Instance    string                `json:"instance,omitempty"` // in a consumer group
}

// OverviewLearner is a learner's figures and its error curve.
type OverviewLearner struct {
	learner.LearnerReport
	Curve []CurvePoint `json:"curve"`
}

// OverviewSettings are what the page needs to know of the configuration.
type OverviewSettings struct {
	TokenRequired  bool   `json:"token_required"` // on changing requests
	DefaultLearner string `json:"default_learner"`
	Units          string `json:"units,omitempty"` // the target's units, when configured
	Interval       string `json:"interval"`        // the method of the intervals predict quotes
	CurveEvery     int64  `json:"curve_every"`
	Group          bool   `json:"group"` // an instance of a consumer group: checkpoints and restores are per partition
}

func (s *Service) handleOverview(c echo.Context) error {
	snap := s.snap.Load()
	r := snap.state.report
	st := OverviewStatus{Source: s.sourceName(), Ready: snap.ready && snap.fault == nil, Positions: r.Positions, Lag: snap.lagTotal(),
		Events: r.Events, Rejected: r.Rejected, Skipped: r.Skipped, Keys: r.Keys, DeadLetters: snap.dead, Checkpoint: snap.state.ckVersion}
	switch {
	case snap.fault != nil:
		st.Message = snap.fault.message
	case snap.outage != nil:
		st.Message = snap.outage.Error()
	case !snap.ready:
		st.Message = "restoring or catching up with the stream"
	}
	if first, last, ok := snap.state.eng.EventTimes(); ok {
		st.EventTimes = &checkpoint.TimeRange{First: time.Unix(0, first).UTC(), Last: time.Unix(0, last).UTC()}
	}
	if snap.group != nil {
		st.Instance = snap.group.Instance
	}
	out := Overview{Status: st, Caution: caution + " Recent error is each key's last " + strconv.Itoa(r.RecentWindow) + " scored events, pooled.",
		Settings: OverviewSettings{TokenRequired: s.cfg.Token != "", DefaultLearner: s.cfg.DefaultLearner, Units: s.cfg.Units, Interval: s.cfg.Interval, CurveEvery: s.cfg.CurveEvery, Group: s.kafka != nil}}
	out.Leader, out.Served = r.Leader, r.Served
	for _, l := range r.Learners {
		pts, _ := s.curves.get(l.Name)
		out.Learners = append(out.Learners, OverviewLearner{LearnerReport: l, Curve: pts})
	}
	slices.SortStableFunc(out.Learners, func(a, b OverviewLearner) int {
		switch ra, rb := a.Recent.RMSE, b.Recent.RMSE; {
		case ra == nil && rb == nil:
			return 0
		case ra == nil:
			return 1
		case rb == nil:
			return -1
		default:
			return cmp.Compare(*ra, *rb)
		}
	})
	out.Alarms, out.Rejections = s.notes.get()
	out.Checkpoints = []checkpoint.Info{}
	for i := len(snap.checkpoints) - 1; i >= 0 && len(out.Checkpoints) < 50; i-- {
		out.Checkpoints = append(out.Checkpoints, snap.checkpoints[i]) // newest first
	}
	return c.JSON(http.StatusOK, out)
}

// sourceName names where events come from, for people.
func (s *Service) sourceName() string {
	switch {
	case s.cfg.Kafka != nil:
		return fmt.Sprintf("Kafka topic %s (group %s)", s.cfg.Kafka.Topic, s.cfg.Kafka.Group)
	case s.cfg.History != "":
		return "history file"
	}
	return "journal (POST /v1/events)"
}

// PinRequest is the body of POST /v1/checkpoints/{version}/pin.
type PinRequest struct {
	Pinned    bool   `json:"pinned"`
	Partition *int32 `json:"partition,omitempty"` // in a consumer group: the partition whose checkpoint it is
}

// handlePin pins a checkpoint, so that retention keeps it, or unpins it.
func (s *Service) handlePin(c echo.Context) error {
	v, err := strconv.ParseUint(c.Param("version"), 10, 64)
	if err != nil || v == 0 {
		return httpErr(http.StatusBadRequest, "version %q: want a positive integer", c.Param("version"))
	}
	var req PinRequest
	if err := decodeJSONBody(c, &req); err != nil {
		return httpErr(http.StatusBadRequest, "the body must be one object {\"pinned\":true|false}: %v", errMessage(err))
	}
	var info checkpoint.Info
	res := s.loop.do(func(l *loop) cmdResult {
		store := l.store
		if l.group != nil {
			if req.Partition == nil || l.group.owned[*req.Partition] == nil {
				return cmdResult{err: cmdErr(ErrInvalidRequest, "in a consumer group, name a partition this instance owns (\"partition\": N)")}
			}
			store = l.group.owned[*req.Partition].store
		}
		if _, err := store.ReadManifest(v); err != nil {
			return cmdResult{err: cmdErr(ErrNoCheckpoint, "checkpoint %d does not exist or cannot be read: %v", v, err)}
		}
		var err error
		if req.Pinned {
			err = store.Pin(v)
		} else {
			err = store.Unpin(v)
		}
		if err != nil {
			return cmdResult{err: cmdErr(ErrNotStored, "could not change the pin of checkpoint %d: %v", v, err).withCause(err)}
		}
		l.publish()
		for _, in := range s.snap.Load().checkpoints {
			if in.Version == v {
				info = in
			}
		}
		return cmdResult{}
	})
	if res.err != nil {
		return answer(res.err)
	}
	return c.JSON(http.StatusOK, info)
}
