package api

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/labstack/echo/v4"

	"tidemark/api/intake"
	"tidemark/learner"
)

// Any instance of a consumer group answers for any key: a predict for a
// key of a partition this instance does not own is forwarded to the owner,
// found through Kafka (each member's address is its group membership's user
// data), and the owner's answer is relayed as it is. Group-wide views are
// put together from every member's part.

// forwardedHeader marks a request one instance forwarded to another: it is
// answered where it lands, never forwarded again.
const forwardedHeader = "Tidemark-Forwarded-By"

// InstanceView is one instance of the group as it describes itself.
type InstanceView struct {
	Instance   string          `json:"instance"`
	Address    string          `json:"address"`
	MemberID   string          `json:"member_id"`
	Generation int32           `json:"generation"`
	Ready      bool            `json:"ready"`
	Partitions []PartitionView `json:"partitions"`
	// Moving lists partitions given up at the end of a generation and not
	// yet reassigned (a rebalance in progress).
	Moving []int32 `json:"moving,omitempty"`
	// Error says why the instance could not be asked (GET /v1/cluster only).
	Error string `json:"error,omitempty"`
}

// PartitionView is an owned partition: how far its state is, how far the
// topic is, and its newest checkpoint.
type PartitionView struct {
	Partition  int32 `json:"partition"`
	Offset     int64 `json:"offset"`      // the last offset the state covers; -1: none yet
	LastOffset int64 `json:"last_offset"` // the topic's last offset in the partition; -1: empty
	Lag        int64 `json:"lag"`         // events waiting to be applied
	Events     int64 `json:"events"`      // events the partition's state has applied
	// Checkpoint is the newest checkpoint of the partition written or
	// loaded here (0: none) and when it was created.
	Checkpoint        uint64     `json:"checkpoint_version"`
	CheckpointCreated *time.Time `json:"checkpoint_created"`
}

// ClusterView answers GET /v1/cluster.
type ClusterView struct {
	Group       string         `json:"group"`
	Topic       string         `json:"topic"`
	Partitions  int            `json:"partitions"`
	Partitioner string         `json:"partitioner"`
	AnsweredBy  string         `json:"answered_by"`
	Instances   []InstanceView `json:"instances"`
	// Unowned lists partitions that no instance reports owning: a
	// rebalance in progress, or an instance that could not be asked.
	Unowned []int32 `json:"unowned"`
}

// joinGroup puts the Kafka intake in group mode, under this instance's name
// and address. Run calls it once it listens.
func (s *Service) joinGroup() {
	s.advertise = s.cfg.Advertise
	if s.advertise == "" {
		scheme := "http"
		if s.cfg.TLSCert != "" {
			scheme = "https"
		}
		host, port, _ := net.SplitHostPort(s.addr)
		if ip := net.ParseIP(host); ip != nil && ip.IsUnspecified() {
			if h, err := os.Hostname(); err == nil {
				host = h
			}
		}
		s.advertise = scheme + "://" + net.JoinHostPort(host, port)
	}
	instance := s.cfg.Instance
	if instance == "" {
		instance = s.advertise
	}
	s.loop.group.instance = instance
	s.kafka.SetOwner(loopOwner{s.loop}, instance, s.advertise)
	s.cfg.Log.Info("consumer group: joining", "group", s.cfg.Kafka.Group, "topic", s.cfg.Kafka.Topic, "instance", instance, "address", s.advertise)
}

// groupView describes this instance for the snapshot. It runs on the loop.
func (l *loop) groupView(state *stateView, last []learner.Position) *InstanceView {
	g := l.group
	v := &InstanceView{Instance: g.instance, MemberID: g.gen.MemberID, Generation: g.gen.ID, Ready: l.ready.Load(), Partitions: []PartitionView{}}
	topic := map[int32]int64{}
	for _, p := range last {
		topic[p.Partition] = p.Offset
	}
	at := map[int32]int64{}
	for _, p := range state.eng.Positions() {
		at[p.Partition] = p.Offset
	}
	for _, p := range g.ownedParts() {
		ps := g.owned[p]
		pv := PartitionView{Partition: p, Offset: -1, LastOffset: -1, Checkpoint: ps.last.Version}
		if o, ok := at[p]; ok {
			pv.Offset = o
		}
		if o, ok := topic[p]; ok {
			pv.LastOffset = o
		}
		pv.Lag = max(0, pv.LastOffset-pv.Offset)
		pv.Events, _, _ = state.eng.PartitionCounts(p)
		if ps.last.Version != 0 {
			t := ps.last.Created
			pv.CheckpointCreated = &t
		}
		v.Partitions = append(v.Partitions, pv)
	}
	for p := range g.parked {
		v.Moving = append(v.Moving, p)
	}
	slices.Sort(v.Moving)
	return v
}

// self returns the published view of this instance, with its address.
func (s *Service) self(snap *snapshot) InstanceView {
	v := *snap.group
	v.Address = s.advertise
	return v
}

// owns reports whether the published state owns partition p.
func (snap *snapshot) owns(p int32) bool {
	return snap.group != nil && slices.ContainsFunc(snap.group.Partitions, func(v PartitionView) bool { return v.Partition == p })
}

// ownerOf finds the member of the group that owns partition p.
func (s *Service) ownerOf(p int32) (intake.Member, bool) {
	members, _ := s.kafka.Members()
	for _, m := range members {
		if slices.Contains(m.Partitions, p) {
			return m, true
		}
	}
	return intake.Member{}, false
}

// isSelf reports whether m is this instance.
func (s *Service) isSelf(m intake.Member) bool {
	if g, ok := s.kafka.Generation(); ok && g.MemberID == m.ID {
		return true
	}
	return m.Address == s.advertise
}

// partitionOf maps a key to its partition, as the producers' partitioner
// does; false while the topic's partition count is not known.
func (s *Service) partitionOf(key string) (int32, bool) {
	n := s.kafka.Partitions()
	if n == 0 {
		return 0, false
	}
	return s.partitioner(key, n), true
}

// unavailable is a 503 that asks the client to retry shortly.
func unavailable(c echo.Context, format string, args ...any) error {
	c.Response().Header().Set("Retry-After", "1")
	return httpErr(http.StatusServiceUnavailable, format, args...)
}

// routePredict answers a predict whose rows are not all of partitions this
// instance owns: rows of other owners are forwarded to them (rows of one
// owner in one request), and a request all of whose rows belong to one
// other instance (a one-row request always) is relayed whole, its answer
// unchanged. It returns false when every row is this instance's to answer.
func (s *Service) routePredict(c echo.Context, snap *snapshot, body []byte, name, chosen string, rows []json.RawMessage) (bool, error) {
	if s.kafka == nil || c.Request().Header.Get(forwardedHeader) != "" {
		return false, nil
	}
	owner := make([]*intake.Member, len(rows)) // nil: this instance
	remote := 0
	var ev learner.Event
	for i, row := range rows {
		if err := learner.DecodeRow(row, &ev); err != nil {
			return false, nil // answered (refused) locally, with the row's number
		}
		p, ok := s.partitionOf(ev.Key)
		if !ok {
			return true, unavailable(c, "the topic's partitions are not known yet (the Kafka brokers have not answered); retry shortly")
		}
		if snap.owns(p) {
			continue
		}
		m, ok := s.ownerOf(p)
		switch {
		case !ok:
			return true, unavailable(c, "key %q is in partition %d, which no instance of the group owns right now (a rebalance in progress); retry shortly", ev.Key, p)
		case s.isSelf(m):
			return true, unavailable(c, "key %q is in partition %d, whose state this instance is loading; retry shortly", ev.Key, p)
		}
		owner[i] = &m
		remote++
	}
	if remote == 0 {
		return false, nil
	}
	if remote == len(rows) && !slices.ContainsFunc(owner, func(m *intake.Member) bool { return m.ID != owner[0].ID }) {
		code, b, err := s.ask(c.Request().Context(), *owner[0], http.MethodPost, "/v1/predict", body)
		if err != nil {
			return true, err
		}
		return true, relay(c, code, b)
	}
	// Rows of several owners: each owner answers its rows; the answer puts
	// them back in order.
	type part struct {
		m    *intake.Member
		idx  []int
		rows []json.RawMessage
		resp PredictResponse
		err  error
	}
	parts := map[string]*part{}
	var local []int
	for i, m := range owner {
		if m == nil {
			local = append(local, i)
			continue
		}
		pt := parts[m.ID]
		if pt == nil {
			pt = &part{m: m}
			parts[m.ID] = pt
		}
		pt.idx = append(pt.idx, i)
		pt.rows = append(pt.rows, rows[i])
	}
	var wg sync.WaitGroup
	for _, pt := range parts {
		wg.Add(1)
		go func() {
			defer wg.Done()
			b, _ := json.Marshal(PredictRequest{Learner: name, Rows: pt.rows})
			code, out, err := s.ask(c.Request().Context(), *pt.m, http.MethodPost, "/v1/predict", b)
			switch {
			case err != nil:
				pt.err = err
			case code != http.StatusOK:
				pt.err = httpErr(code, "rows %v, answered by instance %s: %s", pt.idx, pt.m.Instance, errorText(out))
			default:
				pt.err = json.Unmarshal(out, &pt.resp)
			}
		}()
	}
	resp := PredictResponse{Learner: name, LearnerChosen: chosen, Checkpoint: snap.state.ckVersion, Events: snap.state.applied, Caution: caution,
		Predictions: make([]PredictAnswer, len(rows))}
	if len(local) > 0 {
		sub := make([]json.RawMessage, len(local))
		for j, i := range local {
			sub[j] = rows[i]
		}
		mine, answers, err := s.predictRows(snap, name, sub, false)
		if err == nil {
			err = s.recordAnswers(&mine, answers)
		}
		if err != nil {
			wg.Wait()
			return true, err
		}
		resp.AnswersNotRecorded = mine.AnswersNotRecorded
		for j, i := range local {
			resp.Predictions[i] = mine.Predictions[j]
		}
	}
	wg.Wait()
	for _, pt := range parts {
		if pt.err != nil {
			return true, pt.err
		}
		if len(pt.resp.Predictions) != len(pt.idx) {
			return true, httpErr(http.StatusBadGateway, "instance %s answered %d rows of %d", pt.m.Instance, len(pt.resp.Predictions), len(pt.idx))
		}
		for j, i := range pt.idx {
			resp.Predictions[i] = pt.resp.Predictions[j]
		}
		if pt.resp.AnswersNotRecorded != "" {
			resp.AnswersNotRecorded = pt.resp.AnswersNotRecorded
		}
	}
	return true, c.JSON(http.StatusOK, resp)
}

// relay answers with another instance's answer, as it was; a 503 asks the
// client to retry shortly (the partition was moving).
func relay(c echo.Context, code int, b []byte) error {
	if code == http.StatusServiceUnavailable {
		c.Response().Header().Set("Retry-After", "1")
	}
	return c.JSONBlob(code, b)
}

// ask sends a request to another instance of the group within the forward
// timeout and returns its status and body; an instance that cannot be
// reached is a 503 that names it.
func (s *Service) ask(ctx context.Context, m intake.Member, method, path string, body []byte) (int, []byte, error) {
	if m.Address == "" {
		return 0, nil, httpErr(http.StatusServiceUnavailable, "member %s of the group publishes no address (is it a tidemark instance?)", m.ID)
	}
	ctx, cancel := context.WithTimeout(ctx, s.cfg.ForwardTimeout)
	defer cancel()
	req, err := http.NewRequestWithContext(ctx, method, strings.TrimRight(m.Address, "/")+path, bytes.NewReader(body))
	if err != nil {
		return 0, nil, err
	}
	req.Header.Set(forwardedHeader, s.loop.group.instance)
	if body != nil {
		req.Header.Set("Content-Type", "application/json")
	}
	if s.cfg.Token != "" {
		req.Header.Set("Authorization", "Bearer "+s.cfg.Token)
	}
	res, err := s.forward.Do(req)
	if err != nil {
		return 0, nil, unreachable(m, s.cfg.ForwardTimeout, err)
	}
	defer res.Body.Close()
	b, err := io.ReadAll(io.LimitReader(res.Body, s.cfg.BodyLimit))
	if err != nil {
		return 0, nil, unreachable(m, s.cfg.ForwardTimeout, err)
	}
	return res.StatusCode, b, nil
}

func unreachable(m intake.Member, timeout time.Duration, err error) error {
	return httpErr(http.StatusServiceUnavailable, "instance %s at %s, which owns partitions %v, did not answer within %v: %v; "+
		"if it is gone, the group gives its partitions to the others within the session timeout",
		m.Instance, m.Address, m.Partitions, timeout, errMessage(err))
}

// errorText takes the message out of another instance's error answer.
func errorText(b []byte) string {
	var e struct {
		Message string `json:"message"`
	}
	if json.Unmarshal(b, &e) == nil && e.Message != "" {
		return e.Message
	}
	return string(b)
}

// handleCluster answers GET /v1/cluster: every member of the group with its
// partitions, positions and lag, each asked for its own view;
// ?scope=instance answers with this instance's alone.
func (s *Service) handleCluster(c echo.Context) error {
	if s.kafka == nil {
		return httpErr(http.StatusNotFound, "this service does not read Kafka, so it belongs to no consumer group")
	}
	snap := s.snap.Load()
	if c.QueryParam("scope") == "instance" {
		return c.JSON(http.StatusOK, s.self(snap))
	}
	members, _ := s.kafka.Members()
	views := make([]InstanceView, len(members))
	var wg sync.WaitGroup
	for i, m := range members {
		if s.isSelf(m) {
			views[i] = s.self(snap)
			views[i].MemberID = m.ID
			continue
		}
		wg.Add(1)
		go func() {
			defer wg.Done()
			views[i] = InstanceView{Instance: m.Instance, Address: m.Address, MemberID: m.ID, Partitions: []PartitionView{}}
			code, b, err := s.ask(c.Request().Context(), m, http.MethodGet, "/v1/cluster?scope=instance", nil)
			switch {
			case err != nil:
				views[i].Error = errMessage(err)
			case code != http.StatusOK:
				views[i].Error = fmt.Sprintf("answered %d: %s", code, errorText(b))
			default:
				var v InstanceView
				if err := json.Unmarshal(b, &v); err != nil {
					views[i].Error = err.Error()
				} else {
					views[i] = v
				}
			}
		}()
	}
	wg.Wait()
	out := ClusterView{Group: s.cfg.Kafka.Group, Topic: s.cfg.Kafka.Topic, Partitions: s.kafka.Partitions(), Partitioner: s.cfg.Partitioner,
		AnsweredBy: s.loop.group.instance, Instances: views, Unowned: []int32{}}
	if len(views) == 0 {
		out.Instances = []InstanceView{s.self(snap)} // not (yet) in the group
	}
	for p := range int32(out.Partitions) {
		found := false
		for _, v := range out.Instances {
			found = found || slices.ContainsFunc(v.Partitions, func(pv PartitionView) bool { return pv.Partition == p })
		}
		if !found {
			out.Unowned = append(out.Unowned, p)
		}
	}
	return c.JSON(http.StatusOK, out)
}

// InstanceTotals is one instance's part of a group-wide report: the totals
// of the partitions it owns and, when asked, their per-key figures.
type InstanceTotals struct {
	Instance   string                `json:"instance"`
	Partitions []int32               `json:"partitions"`
	Totals     learner.Totals        `json:"totals"`
	Keys       [][]learner.KeyReport `json:"keys,omitempty"` // per learner, by key
}

// handleTotals answers GET /v1/cluster/totals, what one instance adds to a
// group-wide report. It is refused while partitions move.
func (s *Service) handleTotals(c echo.Context) error {
	if s.kafka == nil {
		return httpErr(http.StatusNotFound, "this service does not read Kafka, so it belongs to no consumer group")
	}
	snap := s.holdState()
	defer snap.state.eng.Release()
	if len(snap.group.Moving) > 0 || !snap.ready {
		return unavailable(c, "instance %s is taking or handing over partitions (a rebalance) or catching up; retry shortly", snap.group.Instance)
	}
	it := InstanceTotals{Instance: snap.group.Instance, Partitions: []int32{}, Totals: snap.state.eng.Totals()}
	for _, p := range snap.group.Partitions {
		it.Partitions = append(it.Partitions, p.Partition)
	}
	if c.QueryParam("keys") != "false" {
		for _, l := range snap.state.eng.Report(true).Learners {
			it.Keys = append(it.Keys, l.Keys)
		}
	}
	return c.JSON(http.StatusOK, it)
}

// GroupReport answers GET /v1/learners?scope=group: the report one instance
// reading the whole topic would give, and who contributed to it.
type GroupReport struct {
	learner.Report
	Contributors []Contributor `json:"contributors"`
}

// Contributor is an instance whose partitions a group-wide report adds up.
type Contributor struct {
	Instance   string  `json:"instance"`
	Address    string  `json:"address"`
	Partitions []int32 `json:"partitions"`
}

// groupReport puts the group-wide report together from every member's
// totals. It fails (503) unless every partition of the topic is owned by an
// instance that answered, each once.
func (s *Service) groupReport(c echo.Context, keys bool) error {
	members, _ := s.kafka.Members()
	n := s.kafka.Partitions()
	if len(members) == 0 || n == 0 {
		return unavailable(c, "the group's members or the topic's partitions are not known yet; retry shortly")
	}
	parts := make([]InstanceTotals, len(members))
	errs := make([]error, len(members))
	q := "/v1/cluster/totals?keys=false"
	if keys {
		q = "/v1/cluster/totals"
	}
	var wg sync.WaitGroup
	for i, m := range members {
		wg.Add(1)
		go func() {
			defer wg.Done()
			code, b, err := s.askOrSelf(c, m, q)
			if err == nil && code != http.StatusOK {
				err = fmt.Errorf("instance %s answered %d: %s", m.Instance, code, errorText(b))
			}
			if err == nil {
				err = json.Unmarshal(b, &parts[i])
			}
			errs[i] = err
		}()
	}
	wg.Wait()
	for i, err := range errs {
		if err != nil {
			return unavailable(c, "the group-wide report needs every instance's part; %s: %v", members[i].Instance, errMessage(err))
		}
	}
	var sum learner.Totals
	var rep GroupReport
	covered := map[int32]string{}
	for i, pt := range parts {
		for _, p := range pt.Partitions {
			if by, dup := covered[p]; dup {
				return unavailable(c, "partition %d is claimed by %s and %s (a rebalance in progress); retry shortly", p, by, pt.Instance)
			}
			covered[p] = pt.Instance
		}
		if i == 0 {
			sum = pt.Totals
		} else if err := sum.Add(pt.Totals); err != nil {
			return unavailable(c, "%s: %v", pt.Instance, err)
		}
		rep.Contributors = append(rep.Contributors, Contributor{Instance: pt.Instance, Address: members[i].Address, Partitions: pt.Partitions})
	}
	var missing []int32
	for p := range int32(n) {
		if _, ok := covered[p]; !ok {
			missing = append(missing, p)
		}
	}
	if len(missing) > 0 {
		return unavailable(c, "partitions %v are owned by no instance that answered (a rebalance in progress); retry shortly", missing)
	}
	r, err := s.cfg.Engine.ReportOf(sum)
	if err != nil {
		return err
	}
	if keys {
		for li := range r.Learners {
			var all []learner.KeyReport
			for _, pt := range parts {
				if li < len(pt.Keys) {
					all = append(all, pt.Keys[li]...)
				}
			}
			slices.SortFunc(all, func(a, b learner.KeyReport) int { return strings.Compare(a.Key, b.Key) })
			r.Learners[li].Keys = all
		}
	}
	rep.Report = r
	return c.JSON(http.StatusOK, rep)
}

// askOrSelf asks member m for path, or this instance itself, in process.
func (s *Service) askOrSelf(c echo.Context, m intake.Member, path string) (int, []byte, error) {
	if !s.isSelf(m) {
		return s.ask(c.Request().Context(), m, http.MethodGet, path, nil)
	}
	return s.askSelf(c, http.MethodGet, path, nil)
}

// askSelf serves a request of this instance's to itself, in process, with
// the credentials and origin of the request c is answering.
func (s *Service) askSelf(c echo.Context, method, path string, body []byte) (int, []byte, error) {
	req := c.Request().Clone(c.Request().Context())
	req.Method = method
	req.URL.Path, req.URL.RawQuery, _ = strings.Cut(path, "?")
	req.RequestURI = ""
	req.Body = io.NopCloser(bytes.NewReader(body))
	req.ContentLength = int64(len(body))
	if body != nil {
		req.Header.Set("Content-Type", "application/json")
	}
	req.Header.Set(forwardedHeader, s.loop.group.instance)
	rec := &recorder{header: http.Header{}}
	s.http.Handler.ServeHTTP(rec, req)
	return rec.code, rec.body.Bytes(), nil
}

// recorder is a minimal http.ResponseWriter for answering oneself.
type recorder struct {
	header http.Header
	code   int
	body   bytes.Buffer
}

func (r *recorder) Header() http.Header { return r.header }
func (r *recorder) Write(b []byte) (int, error) {
	if r.code == 0 {
		r.code = http.StatusOK
	}
	return r.body.Write(b)
}
func (r *recorder) WriteHeader(code int) { r.code = code }
