package api

import (
	"bytes"
	"crypto/subtle"
	_ "embed"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/labstack/echo/v4"
	"github.com/labstack/echo/v4/middleware"

	"tidemark/api/intake"
	"tidemark/checkpoint"
	"tidemark/learner"
)

//go:embed openapi.json
var openapiDoc []byte

// Server timeouts: a slow client cannot hold a connection open for ever.
const (
	readHeaderTimeout = 5 * time.Second
	readTimeout       = 60 * time.Second
	writeTimeout      = 60 * time.Second
	idleTimeout       = 120 * time.Second
)

func (s *Service) newHTTP() *http.Server {
	e := echo.New()
	e.HideBanner, e.HidePort = true, true
	e.HTTPErrorHandler = s.errorHandler
	e.Use(middleware.Recover())
	e.Use(middleware.BodyLimit(strconv.FormatInt(s.cfg.BodyLimit, 10) + "B"))
	e.Use(s.checkHost)
	auth := s.requireToken
	changing := func(types ...string) []echo.MiddlewareFunc {
		return []echo.MiddlewareFunc{s.sameOrigin, requireType(types...), auth}
	}
	e.POST("/v1/predict", s.handlePredict)
	e.POST("/v1/events", s.handleEvents, changing(eventsTypes...)...)
	read := func(next echo.HandlerFunc) echo.HandlerFunc { return next }
	if s.cfg.TokenForReads {
		read = auth
	}
	e.GET("/v1/learners", s.handleLearners, read)
	e.GET("/v1/learners/:name/curve", s.handleCurve, read)
	e.GET("/v1/checkpoints", s.handleCheckpoints, read)
	e.POST("/v1/checkpoints", s.handleTakeCheckpoint, changing(jsonTypes...)...)
	e.POST("/v1/checkpoints/:version/restore", s.handleRestore, changing(jsonTypes...)...)
	e.POST("/v1/intake/skip-damaged", s.handleSkipDamaged, changing(jsonTypes...)...)
	e.GET("/v1/cluster", s.handleCluster, read)
	e.GET("/v1/cluster/totals", s.handleTotals, read)
	e.POST("/v1/cluster/restore", s.handleGroupRestore, changing(jsonTypes...)...)
	e.GET("/healthz", s.handleHealth)
	e.GET("/readyz", s.handleReady)
	e.GET("/metrics", echo.WrapHandler(s.metrics.handler()), read)
	e.GET("/", s.handlePage, read)
	e.GET("/:asset", s.handlePage, read)
	e.GET("/v1/overview", s.handleOverview, read)
	e.POST("/v1/checkpoints/:version/pin", s.handlePin, changing(jsonTypes...)...)
	e.GET("/v1/openapi.json", func(c echo.Context) error { return c.Blob(http.StatusOK, echo.MIMEApplicationJSON, openapiDoc) })
	return &http.Server{Addr: s.cfg.Listen, Handler: e, ReadHeaderTimeout: readHeaderTimeout,
		ReadTimeout: readTimeout, WriteTimeout: writeTimeout, IdleTimeout: idleTimeout,
		ErrorLog: slog.NewLogLogger(s.cfg.Log.Handler(), slog.LevelWarn)}
}

// errorHandler renders every error as {"message": ...}; the cause of a 5xx
// goes to the log, not to the client.
func (s *Service) errorHandler(err error, c echo.Context) {
	if c.Response().Committed {
		return
	}
	code, msg := http.StatusInternalServerError, "internal error; see the service log"
	var he *echo.HTTPError
	if errors.As(err, &he) {
		code = he.Code
		msg = fmt.Sprint(he.Message)
		if code == http.StatusRequestEntityTooLarge && msg == http.StatusText(code) {
			// echo's body limit: say which limit (others say their own).
			msg = fmt.Sprintf("request body larger than the limit of %d bytes; send fewer events or rows per request", s.cfg.BodyLimit)
		}
		// Answers never show where the service keeps its data.
		if s.dataDir != "" {
			msg = strings.ReplaceAll(msg, s.dataDir, "DATA")
		}
		if d := filepath.Clean(s.cfg.DataDir); d != "." {
			msg = strings.ReplaceAll(msg, d+string(filepath.Separator), "DATA"+string(filepath.Separator))
			if strings.ContainsRune(d, filepath.Separator) {
				msg = strings.ReplaceAll(msg, d, "DATA")
			}
		}
		if he.Internal != nil && code >= 500 {
			s.cfg.Log.Error("request failed", "path", c.Path(), "error", he.Internal)
		}
	} else {
		s.cfg.Log.Error("request failed", "path", c.Path(), "error", err)
	}
	c.JSON(code, map[string]string{"message": Plain(msg)})
}

func httpErr(code int, format string, args ...any) error {
	return echo.NewHTTPError(code, fmt.Sprintf(format, args...))
}

// requireToken checks "Authorization: Bearer <token>" in constant time when
// a token is configured.
func (s *Service) requireToken(next echo.HandlerFunc) echo.HandlerFunc {
	return func(c echo.Context) error {
		if s.cfg.Token == "" {
			return next(c)
		}
		// The scheme is matched case-insensitively (RFC 7235 §2.1).
		scheme, got, ok := strings.Cut(c.Request().Header.Get("Authorization"), " ")
		got = strings.TrimLeft(got, " ")
		if !ok || !strings.EqualFold(scheme, "Bearer") || subtle.ConstantTimeCompare([]byte(got), []byte(s.cfg.Token)) != 1 {
			c.Response().Header().Set("WWW-Authenticate", `Bearer realm="tidemark"`)
			return httpErr(http.StatusUnauthorized, "send Authorization: Bearer <token> with the service's token (it is required on changing endpoints, and on reads with --token-for-reads)")
		}
		return next(c)
	}
}

// errMessage returns an HTTP error's message, or the error's text.
func errMessage(err error) string {
	var he *echo.HTTPError
	if errors.As(err, &he) {
		return fmt.Sprint(he.Message)
	}
	return err.Error()
}

// decodeJSONBody reads a JSON object body into v strictly: unknown fields
// and anything after the object are refused with 400.
func decodeJSONBody(c echo.Context, v any) error {
	body, err := readBody(c)
	if err != nil {
		return err
	}
	dec := json.NewDecoder(bytes.NewReader(body))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return httpErr(http.StatusBadRequest, "the body is not the JSON object this endpoint takes: %v", err)
	}
	if _, err := dec.Token(); err != io.EOF {
		return httpErr(http.StatusBadRequest, "the body has data after its JSON object; send one object")
	}
	return nil
}

func readBody(c echo.Context) ([]byte, error) {
	b, err := io.ReadAll(c.Request().Body)
	if err != nil {
		var he *echo.HTTPError
		if errors.As(err, &he) {
			return nil, he
		}
		return nil, httpErr(http.StatusBadRequest, "could not read the request body: %v", err)
	}
	return b, nil
}

// PredictRow is one row of a predict request: the features of an event
// (and its key and time), without target.
type PredictRow = json.RawMessage

// PredictRequest is the body of POST /v1/predict: one row (an event without
// target) or {"rows": [...]}, and optionally the learner to ask.
type PredictRequest struct {
	Learner string            `json:"learner,omitempty"`
	Rows    []json.RawMessage `json:"rows,omitempty"`
}

// Interval is a prediction interval at a nominal level, by one of two
// methods (learner.Scorer): "conformal", prediction ± the key's tracked
// quantile of absolute errors, which adapts to the misses it sees (the
// default); or "normal", prediction ± z × the key's recent RMSE, a normal
// approximation. Check the coverage each achieved (GET /v1/learners) before
// relying on one.
type Interval struct {
	Low    float64 `json:"low"`
	High   float64 `json:"high"`
	Method string  `json:"method"`
	Level  float64 `json:"level"`
}

// PredictAnswer is the answer for one row.
type PredictAnswer struct {
	Key string `json:"key"`
	// AnswerID names this answer: send it as an event's "answer_id" (with
	// the event, or alone with the target) once the truth is known, and
	// the answer is scored as served (GET /v1/learners, "served"). The
	// row's own answer_id when it gave one.
	AnswerID string `json:"answer_id,omitempty"`
	// AnsweredBy names the learner that answered when the request asked
	// for the key's leader ("learner":"leader").
	AnsweredBy string    `json:"answered_by,omitempty"`
	Prediction float64   `json:"prediction"`
	Interval   *Interval `json:"interval,omitempty"`
	RecentRMSE *float64  `json:"recent_rmse"`
	Trained    int64     `json:"events_trained"`
	Scored     int64     `json:"events_scored"`
}

// PredictResponse is the body of a predict answer. A one-row request is
// answered with the row's fields at the top level (the embedded
// PredictAnswer); a {"rows": […]} request with predictions, one per row in
// order, and no top-level row fields. In a consumer group Checkpoint and
// Events describe the instance that answered: the key's owner, or, for rows
// of several owners, the instance asked.
type PredictResponse struct {
	Learner string `json:"learner"`
	// LearnerChosen says who chose the learner: "request" (it named one)
	// or "default" (it named none; the service's default learner answered,
	// --default-learner, else the first configured).
	LearnerChosen string          `json:"learner_chosen"`
	Checkpoint    uint64          `json:"checkpoint_version"`
	Events        int64           `json:"events_applied"`
	Predictions   []PredictAnswer `json:"predictions,omitempty"`
	*PredictAnswer
	// AnswersNotRecorded says why the answers carry no answer_id: they
	// could not be recorded (the answer log failed; the key moved), so
	// their labels cannot be matched. The predictions themselves stand.
	AnswersNotRecorded string `json:"answers_not_recorded,omitempty"`
	Caution            string `json:"caution"`
}

const caution = "A prediction is only as good as the learner's recent error on this key: check recent_rmse before acting. tidemark is not a safety system."

func (s *Service) handlePredict(c echo.Context) error {
	start := time.Now()
	defer func() { s.metrics.predictLatency.Observe(time.Since(start).Seconds()) }()
	body, err := readBody(c)
	if err != nil {
		return err
	}
	var req struct {
		Learner string          `json:"learner"`
		Rows    json.RawMessage `json:"rows"` // present (even null) means a rows request
	}
	if err := json.Unmarshal(body, &req); err != nil {
		return httpErr(http.StatusBadRequest, "the body is not a JSON object: %v; send {\"key\":…,\"features\":{…}} or {\"rows\":[…]}", err)
	}
	single := req.Rows == nil
	var rows []json.RawMessage
	if single {
		rows = []json.RawMessage{body}
	} else if err := json.Unmarshal(req.Rows, &rows); err != nil || rows == nil {
		return httpErr(http.StatusBadRequest, "rows must be an array of rows, e.g. {\"rows\":[{\"key\":…,\"features\":{…}}]}")
	}
	if len(rows) == 0 {
		return httpErr(http.StatusBadRequest, "rows is empty; send at least one row")
	}
	if len(rows) > s.cfg.MaxRows {
		return httpErr(http.StatusRequestEntityTooLarge, "%d rows, more than the limit of %d rows per request (--max-rows); send fewer per request", len(rows), s.cfg.MaxRows)
	}
	name, chosen := req.Learner, "request"
	switch name {
	case "":
		name, chosen = s.cfg.DefaultLearner, "default"
	case learner.LeaderName:
		chosen = "leader"
	}
	snap := s.holdState()
	defer snap.state.eng.Release()
	if routed, err := s.routePredict(c, snap, body, name, chosen, rows); routed {
		return err
	}
	resp, answers, err := s.predictRows(snap, name, rows, single)
	if err != nil {
		return err
	}
	if err := s.recordAnswers(&resp, answers); err != nil {
		return err
	}
	resp.LearnerChosen = chosen
	return c.JSON(http.StatusOK, resp)
}

// recordAnswers registers the answers of resp with the loop and waits until
// their log has them on stable storage; then it gives each its id. An id
// already waiting for its label is refused (409); when the answers cannot
// be recorded the predictions go out without ids, saying why.
func (s *Service) recordAnswers(resp *PredictResponse, answers []learner.Answer) error {
	if s.cfg.NoAnswerLog {
		return nil
	}
	var ws []written
	var err error
	s.loop.do(func(l *loop) cmdResult { ws, err = l.serveAnswers(answers); return cmdResult{} })
	for _, w := range ws {
		if err == nil {
			err = w.log.Sync(w.seq)
		}
	}
	switch {
	case errors.Is(err, learner.ErrDuplicateAnswer):
		return httpErr(http.StatusConflict, "%v: give each answer an id of its own, or none (one is made)", err)
	case err != nil:
		s.cfg.Log.Error("answers could not be recorded; served without ids", "error", err)
		resp.AnswersNotRecorded = Plain(fmt.Sprintf("the answers could not be recorded (%v); their labels cannot be matched", err))
		return nil
	}
	set := func(a *PredictAnswer, i int) { a.AnswerID = answers[i].ID }
	if resp.PredictAnswer != nil {
		set(resp.PredictAnswer, 0)
	}
	for i := range resp.Predictions {
		set(&resp.Predictions[i], i)
	}
	return nil
}

// predictRows answers rows from the published state, and returns what was
// answered as learner.Answers for recordAnswers.
func (s *Service) predictRows(snap *snapshot, name string, rows []json.RawMessage, single bool) (PredictResponse, []learner.Answer, error) {
	resp := PredictResponse{Learner: name, Checkpoint: snap.state.ckVersion, Events: snap.state.applied, Caution: caution}
	learnerRow := len(s.cfg.Engine.Learners) // the leader's
	if i := slices.IndexFunc(s.cfg.Engine.Learners, func(sp learner.Spec) bool { return sp.Name == name }); i >= 0 {
		learnerRow = i
	}
	answers := make([]learner.Answer, 0, len(rows))
	var ev learner.Event
	for i, row := range rows {
		where := ""
		if !single {
			where = fmt.Sprintf("row %d: ", i)
		}
		if err := learner.DecodeRow(row, &ev); err != nil {
			return resp, nil, httpErr(http.StatusBadRequest, "%s%v", where, err)
		}
		if s.kafka != nil {
			if p, ok := s.partitionOf(ev.Key); ok && !snap.owns(p) {
				return resp, nil, httpErr(http.StatusServiceUnavailable, "%skey %q is in partition %d, which instance %s does not own (it moved); retry shortly", where, ev.Key, p, snap.group.Instance)
			}
		}
		p, err := snap.state.predict(ev.Key, name, &ev)
		switch {
		case errors.Is(err, learner.ErrUnknownLearner):
			return resp, nil, httpErr(http.StatusNotFound, "%s%v", where, err)
		case errors.Is(err, learner.ErrUnknownKey):
			return resp, nil, httpErr(http.StatusNotFound, "%s%v; a key gets learners with its first event", where, err)
		case errors.Is(err, learner.ErrRejected):
			return resp, nil, httpErr(http.StatusBadRequest, "%s%v", where, err)
		case errors.Is(err, learner.ErrNotReady):
			return resp, nil, httpErr(http.StatusConflict, "%s%v; it needs more events before it predicts", where, err)
		case err != nil:
			return resp, nil, err
		}
		if s.cfg.MinScored > 0 && p.Scored < s.cfg.MinScored {
			return resp, nil, httpErr(http.StatusConflict, "%slearner %q has been scored on %d events of key %q; it answers after %d, so that its recent error can be checked first",
				where, name, p.Scored, ev.Key, s.cfg.MinScored)
		}
		a := PredictAnswer{Key: ev.Key, Prediction: p.Value, RecentRMSE: p.RecentRMSE, Trained: p.Trained, Scored: p.Scored}
		if name == learner.LeaderName {
			a.AnsweredBy = p.Learner
		}
		half := p.Conformal
		if s.cfg.Interval == IntervalNormal {
			half = p.Normal
		}
		ans := learner.Answer{ID: ev.AnswerID, Key: ev.Key, Learner: learnerRow, Value: p.Value}
		if ans.ID == "" {
			ans.ID = newAnswerID()
		}
		if half != nil && !math.IsNaN(*half) {
			a.Interval = &Interval{Low: p.Value - *half, High: p.Value + *half, Method: s.cfg.Interval, Level: p.Level}
			ans.Low, ans.High, ans.HasInterval = a.Interval.Low, a.Interval.High, true
		}
		answers = append(answers, ans)
		if single {
			resp.PredictAnswer = &a
		} else {
			resp.Predictions = append(resp.Predictions, a)
		}
	}
	return resp, answers, nil
}

// EventsResponse answers POST /v1/events.
type EventsResponse struct {
	Accepted    int             `json:"accepted"`
	FirstOffset int64           `json:"first_offset,omitempty"`
	LastOffset  int64           `json:"last_offset,omitempty"`
	Rejected    []RejectedEvent `json:"rejected,omitempty"`
}

// RejectedEvent names an event of the request that was not accepted: its
// index among the request's events (from 0), its line (from 1; for a JSON
// array, its element number from 1) and why.
type RejectedEvent struct {
	Index  int    `json:"index"`
	Line   int    `json:"line"`
	Reason string `json:"reason"`
}

// handleEvents journals the request's events that the engine will take.
// Events that do not decode, or that the engine would refuse (a schema
// feature missing or of the wrong type, no time where one is needed, a new
// key past the cap — checked against the published state), are refused
// with their line and reason and never journalled; the others are
// acknowledged once durable.
func (s *Service) handleEvents(c echo.Context) error {
	if s.journal == nil {
		return httpErr(http.StatusConflict, "this service learns from %v, not from events posted to it (for Kafka: produce them to its topic)", s.loop.src)
	}
	if f := s.fault.Load(); f != nil {
		return httpErr(http.StatusServiceUnavailable, "events refused: %s", f.message)
	}
	body, err := readBody(c)
	if err != nil {
		return err
	}
	lines, err := splitEvents(body)
	if err != nil {
		return httpErr(http.StatusBadRequest, "%v", err)
	}
	if len(lines) > s.cfg.MaxRows {
		return httpErr(http.StatusRequestEntityTooLarge, "%d events, more than the limit of %d events per request (--max-rows); send fewer per request", len(lines), s.cfg.MaxRows)
	}
	var resp EventsResponse
	var ok [][]byte
	var ev learner.Event
	held := s.holdState()
	defer held.state.eng.Release()
	v := held.state.eng.NewValidator()
	var mapper *intake.Mapper
	if s.cfg.Fields.Mapped() {
		mapper, _ = intake.NewMapper(s.cfg.Fields) // validated with the configuration
	}
	for i, l := range lines {
		data := l.data
		var err error
		if mapper != nil {
			if data, err = mapper.Canonical(l.data); err != nil {
				err = fmt.Errorf("%w: %v", learner.ErrInvalidEvent, err)
			}
		}
		if err == nil {
			err = learner.DecodeEvent(data, &ev)
		}
		if err == nil {
			err = v.Check(&ev)
		}
		if err != nil {
			reason := "decode"
			if rj := (*learner.Rejection)(nil); errors.As(err, &rj) {
				reason = rj.Kind.String()
			}
			s.metrics.refused.WithLabelValues(reason).Inc()
			resp.Rejected = append(resp.Rejected, RejectedEvent{Index: i, Line: l.line, Reason: Plain(err.Error())})
			continue
		}
		ok = append(ok, l.data)
	}
	if len(ok) == 0 {
		return c.JSON(http.StatusBadRequest, map[string]any{"message": fmt.Sprintf("no event of the request can be learned (line %d: %s); see rejected",
			resp.Rejected[0].Line, resp.Rejected[0].Reason), "rejected": resp.Rejected})
	}
	first, last, err := s.journal.Append(ok)
	if err != nil {
		s.metrics.journalFailures.Inc()
		if s.loop.vanished(err) {
			return echo.NewHTTPError(http.StatusServiceUnavailable, "events refused: "+s.fault.Load().message).SetInternal(err)
		}
		return echo.NewHTTPError(http.StatusServiceUnavailable, "the events could not be stored durably and were not accepted; retry later").SetInternal(err)
	}
	s.metrics.eventsReceived.Add(float64(len(ok)))
	resp.Accepted, resp.FirstOffset, resp.LastOffset = len(ok), first, last
	return c.JSON(http.StatusOK, resp)
}

// eventLine is one event of a request body and where it was.
type eventLine struct {
	data []byte
	line int // line of NDJSON, or element of a JSON array, from 1
}

// splitEvents accepts NDJSON (one event per line; blank lines skipped) or a
// JSON array of events.
func splitEvents(body []byte) ([]eventLine, error) {
	t := bytes.TrimSpace(body)
	if len(t) == 0 {
		return nil, errors.New("the body is empty; send NDJSON events or a JSON array of events")
	}
	if t[0] == '[' {
		var arr []json.RawMessage
		if err := json.Unmarshal(t, &arr); err != nil {
			return nil, fmt.Errorf("the body starts with [ but is not a JSON array: %v", err)
		}
		out := make([]eventLine, len(arr))
		for i, a := range arr {
			out[i] = eventLine{bytes.TrimSpace(a), i + 1}
		}
		return out, nil
	}
	var out []eventLine
	for i, l := range bytes.Split(body, []byte("\n")) {
		if l = bytes.TrimSpace(l); len(l) > 0 {
			out = append(out, eventLine{l, i + 1})
		}
	}
	return out, nil
}

func (s *Service) handleLearners(c echo.Context) error {
	switch scope := c.QueryParam("scope"); scope {
	case "", "instance":
	case "group":
		if s.kafka == nil {
			return httpErr(http.StatusBadRequest, "scope=group: this service does not read Kafka, so it belongs to no consumer group; leave scope out")
		}
		return s.groupReport(c, c.QueryParam("keys") != "false")
	default:
		return httpErr(http.StatusBadRequest, "scope %q: want instance (the default: this instance's partitions) or group (every instance's)", scope)
	}
	snap := s.snap.Load()
	r := snap.state.report
	if c.QueryParam("keys") != "false" {
		// Per-key figures visit every key of the published copy: work this
		// request asks for, not something every publish pays.
		snap = s.holdState()
		r = snap.state.eng.Report(true)
		snap.state.eng.Release()
	}
	return c.JSON(http.StatusOK, r)
}

func (s *Service) handleCurve(c echo.Context) error {
	pts, ok := s.curves.get(c.Param("name"))
	if !ok {
		return httpErr(http.StatusNotFound, "no learner named %q (configured: %s)", c.Param("name"), s.cfg.Engine.Names())
	}
	return c.JSON(http.StatusOK, map[string]any{"learner": c.Param("name"), "every": s.cfg.CurveEvery, "points": pts})
}

func (s *Service) handleCheckpoints(c echo.Context) error {
	list := s.snap.Load().checkpoints
	if list == nil {
		list = []checkpoint.Info{}
	}
	return c.JSON(http.StatusOK, list)
}

func (s *Service) handleTakeCheckpoint(c echo.Context) error {
	if s.kafka != nil {
		var infos []checkpoint.Info
		res := s.loop.do(func(l *loop) cmdResult {
			var err error
			if infos, err = l.checkpointParts(checkpoint.Manual, true); err != nil {
				return cmdResult{err: cmdErr(ErrNotStored, "a partition's checkpoint could not be written; earlier ones are intact").withCause(err)}
			}
			l.publish()
			return cmdResult{}
		})
		if res.err != nil {
			return answer(res.err)
		}
		if infos == nil {
			infos = []checkpoint.Info{}
		}
		for i := range infos {
			infos[i].Partition = &infos[i].Position[0].Partition
		}
		return c.JSON(http.StatusCreated, infos)
	}
	res := s.loop.do(func(l *loop) cmdResult {
		if err := l.checkpoint(checkpoint.Manual, 0); err != nil {
			return cmdResult{err: cmdErr(ErrNotStored, "the checkpoint could not be written; earlier ones are intact").withCause(err)}
		}
		l.publish()
		return cmdResult{info: l.lastCk}
	})
	if res.err != nil {
		return answer(res.err)
	}
	return c.JSON(http.StatusCreated, res.info)
}

func (s *Service) handleRestore(c echo.Context) error {
	v, err := strconv.ParseUint(c.Param("version"), 10, 64)
	if err != nil || v == 0 {
		return httpErr(http.StatusBadRequest, "version %q: want a positive integer", c.Param("version"))
	}
	var req RestoreRequest
	if err := decodeJSONBody(c, &req); err != nil {
		return httpErr(http.StatusBadRequest, "the body must be one object {\"resume\":\"from_checkpoint\"|\"from_now\"|\"skip\", …}: %v", errMessage(err))
	}
	if s.kafka != nil && req.Partition != nil && c.Request().Header.Get(forwardedHeader) == "" {
		// The partition's owner restores it.
		if routed, err := s.routeToOwner(c, *req.Partition, req); routed {
			return err
		}
	}
	if req.DryRun || req.Resume == ResumeSkip.String() {
		preview, err := s.previewRestore(c.Request().Context(), v, req)
		if err != nil {
			return answer(err)
		}
		if req.DryRun {
			return c.JSON(http.StatusOK, preview)
		}
		if preview.Skip == 0 {
			return answer(cmdErr(ErrConflict, "the skip range selects no event after checkpoint %d (of the %d it would replay): nothing would be left out; "+
				"check the range against the events' times (GET /v1/checkpoints shows the event times each checkpoint holds), or say \"dry_run\":true to count first",
				v, preview.Replay))
		}
	}
	res := s.loop.do(func(l *loop) cmdResult { return l.restore(v, req) })
	if res.err != nil {
		return answer(res.err)
	}
	return c.JSON(http.StatusOK, RestoreResult{Restored: v, Resume: req.Resume, Checkpoint: res.info, Position: s.snap.Load().state.eng.Positions()})
}

func (s *Service) handleHealth(c echo.Context) error {
	if f := s.snap.Load().fault; f != nil && f.kind == faultVanished {
		return c.JSON(http.StatusServiceUnavailable, map[string]any{"status": "failing", "message": f.message})
	}
	return c.JSON(http.StatusOK, map[string]string{"status": "ok"})
}

// handleReady answers from the published snapshot alone.
func (s *Service) handleReady(c echo.Context) error {
	snap := s.snap.Load()
	if f := snap.fault; f != nil {
		return c.JSON(http.StatusServiceUnavailable, map[string]any{"ready": false, "message": f.message,
			"since": f.since.UTC().Format(time.RFC3339)})
	}
	if snap.outage != nil {
		return c.JSON(http.StatusServiceUnavailable, map[string]any{"ready": false, "message": snap.outage.Error()})
	}
	if !snap.ready {
		return c.JSON(http.StatusServiceUnavailable, map[string]any{"ready": false, "message": "restoring or catching up with the stream"})
	}
	if bound := s.cfg.ReadyMaxLag; bound > 0 {
		if waiting := snap.lagTotal(); waiting > bound {
			return c.JSON(http.StatusServiceUnavailable, map[string]any{"ready": false, "lag": waiting,
				"message": fmt.Sprintf("%d events wait to be applied, more than the bound of %d (--ready-max-lag)", waiting, bound)})
		}
	}
	return c.JSON(http.StatusOK, map[string]any{"ready": true})
}

// routes lists the routes the server serves (for the OpenAPI test).
func (s *Service) routes() []*echo.Route { return s.http.Handler.(*echo.Echo).Routes() }

// openapiPath turns an echo path (/v1/checkpoints/:version/restore) into an
// OpenAPI one (/v1/checkpoints/{version}/restore).
func openapiPath(p string) string {
	parts := strings.Split(p, "/")
	for i, part := range parts {
		if name, ok := strings.CutPrefix(part, ":"); ok {
			parts[i] = "{" + name + "}"
		}
	}
	return strings.Join(parts, "/")
}
