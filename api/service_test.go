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
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/api/replay"
	"tidemark/bench/synth"
	"tidemark/checkpoint"
	"tidemark/learner"
)

var serviceSpecs = []string{"knn:k=5,window=200", "rls:forget=0.99", "sliding-rls:window=100", "mean:window=50"}

func engineConfig(t testing.TB, specs ...string) learner.Config {
	t.Helper()
	cfg := learner.Config{Features: learner.FeatureConfig{HashBuckets: 4, TimeFeatures: true}}
	for _, s := range specs {
		sp, err := learner.ParseSpec(s)
		if err != nil {
			t.Fatal(err)
		}
		cfg.Learners = append(cfg.Learners, sp)
	}
	return cfg
}

func testConfig(t testing.TB, dir string) Config {
	return Config{Listen: "127.0.0.1:0", DataDir: dir, Engine: engineConfig(t, serviceSpecs...),
		PublishEvery: 10 * time.Millisecond, CheckpointEvery: 300, MinScored: -1}
}

type running struct {
	svc  *Service
	base string
	stop func() error
}

func start(t testing.TB, cfg Config) *running {
	t.Helper()
	svc, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	r := &running{svc: svc, base: "http://" + svc.Addr()}
	stopped := false
	r.stop = func() error {
		if stopped {
			return nil
		}
		stopped = true
		cancel()
		return <-done
	}
	t.Cleanup(func() { r.stop() })
	return r
}

func (r *running) call(t testing.TB, method, path, token string, body []byte) (int, []byte) {
	t.Helper()
	req, _ := http.NewRequest(method, r.base+path, bytes.NewReader(body))
	if len(body) > 0 {
		req.Header.Set("Content-Type", "application/json") // events too: the service takes JSON or NDJSON there
	}
	if token != "" {
		req.Header.Set("Authorization", "Bearer "+token)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, b
}

func (r *running) report(t testing.TB) learner.Report {
	t.Helper()
	code, b := r.call(t, "GET", "/v1/learners", "", nil)
	if code != 200 {
		t.Fatalf("GET /v1/learners: %d %s", code, b)
	}
	var rep learner.Report
	if err := json.Unmarshal(b, &rep); err != nil {
		t.Fatal(err)
	}
	return rep
}

// waitCovered waits until the published state covers journal offset n.
func (r *running) waitCovered(t testing.TB, n int64) learner.Report {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		rep := r.report(t)
		for _, p := range rep.Positions {
			if p.Partition == 0 && p.Offset >= n {
				return rep
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("the service did not reach offset %d: %+v", n, rep.Positions)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// scenario returns the valid event lines of the demo scenario.
func scenario(t testing.TB, days int) [][]byte {
	t.Helper()
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: days, Seed: 9})
	var out [][]byte
	var ev learner.Event
	for _, l := range bytes.Split(bytes.TrimSpace(buf.Bytes()), []byte("\n")) {
		if learner.DecodeEvent(l, &ev) == nil {
			out = append(out, l)
		}
	}
	return out
}

func (r *running) post(t testing.TB, token string, lines [][]byte) {
	t.Helper()
	for i := 0; i < len(lines); i += 250 {
		batch := lines[i:min(i+250, len(lines))]
		code, b := r.call(t, "POST", "/v1/events", token, bytes.Join(batch, []byte("\n")))
		if code != 200 {
			t.Fatalf("POST /v1/events: %d %s", code, b)
		}
	}
}

// replayReport runs the same lines through `replay`'s code path: line i is
// journal offset i, so the reports must agree to the byte.
func replayReport(t testing.TB, cfg learner.Config, lines [][]byte) learner.Report {
	t.Helper()
	eng, err := learner.NewEngine(cfg)
	if err != nil {
		t.Fatal(err)
	}
	h := intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(lines, []byte("\n")), '\n')))
	if err := replay.Replay(context.Background(), h, eng, replay.ReplayConfig{}); err != nil {
		t.Fatal(err)
	}
	return eng.Report(true)
}

func sameJSON(t testing.TB, what string, got, want any) {
	t.Helper()
	g, _ := json.Marshal(got)
	w, _ := json.Marshal(want)
	if !bytes.Equal(g, w) {
		t.Errorf("%s differ:\n got %.600s\nwant %.600s", what, g, w)
	}
}

func TestServiceAgreesWithReplay(t *testing.T) {
	lines := scenario(t, 2)
	r := start(t, testConfig(t, t.TempDir()))
	r.post(t, "", lines)
	got := r.waitCovered(t, int64(len(lines)))
	sameJSON(t, "service and replay reports", got, replayReport(t, engineConfig(t, serviceSpecs...), lines))
}

func TestRestartAfterShutdownKeepsState(t *testing.T) {
	lines := scenario(t, 2)
	dir := t.TempDir()
	r := start(t, testConfig(t, dir))
	r.post(t, "", lines[:900])
	before := r.waitCovered(t, 900)
	if err := r.stop(); err != nil {
		t.Fatalf("shutdown: %v", err)
	}
	r2 := start(t, testConfig(t, dir))
	sameJSON(t, "report after restart", r2.report(t), before)
	r2.post(t, "", lines[900:])
	got := r2.waitCovered(t, int64(len(lines)))
	sameJSON(t, "report after restart and more events", got, replayReport(t, engineConfig(t, serviceSpecs...), lines))
}

func TestRestoreModes(t *testing.T) {
	lines := scenario(t, 2)
	cfg := engineConfig(t, serviceSpecs...)
	n := len(lines)

	checkpointAt := func(t *testing.T, r *running, upTo int) uint64 {
		r.post(t, "", lines[:upTo])
		r.waitCovered(t, int64(upTo))
		code, b := r.call(t, "POST", "/v1/checkpoints", "", nil)
		if code != 201 {
			t.Fatalf("POST /v1/checkpoints: %d %s", code, b)
		}
		var info struct{ Version uint64 }
		json.Unmarshal(b, &info)
		return info.Version
	}
	restore := func(t *testing.T, r *running, v uint64, body string) {
		code, b := r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", v), "", []byte(body))
		if code != 200 {
			t.Fatalf("restore: %d %s", code, b)
		}
		var res RestoreResult
		if json.Unmarshal(b, &res) != nil || res.Checkpoint.Reason != checkpoint.Restore || res.Checkpoint.Parent != v {
			t.Errorf("the checkpoint recording the restore: %+v, want reason restore and parent %d", res.Checkpoint, v)
		}
	}

	t.Run("from_checkpoint", func(t *testing.T) {
		r := start(t, testConfig(t, t.TempDir()))
		v := checkpointAt(t, r, 600)
		r.post(t, "", lines[600:])
		r.waitCovered(t, int64(n))
		restore(t, r, v, `{"resume":"from_checkpoint"}`)
		// Replaying every event after the checkpoint rebuilds the same state.
		sameJSON(t, "after from_checkpoint", r.waitCovered(t, int64(n)), replayReport(t, cfg, lines))
	})

	t.Run("from_now", func(t *testing.T) {
		r := start(t, testConfig(t, t.TempDir()))
		v := checkpointAt(t, r, 600)
		r.post(t, "", lines[600:1000])
		r.waitCovered(t, 1000)
		restore(t, r, v, `{"resume":"from_now"}`)
		r.post(t, "", lines[1000:])
		got := r.waitCovered(t, int64(n))
		// Events 601..1000 are forgotten: the state equals a run over 1..600
		// then 1001..n, that is every line but those.
		eng, _ := learner.NewEngine(cfg)
		replay.Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(lines[:600], []byte("\n")), '\n'))), eng, replay.ReplayConfig{})
		eng.CoverUpTo([]learner.Position{{Partition: 0, Offset: 1000}})
		replay.Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(lines, []byte("\n")), '\n'))), eng, replay.ReplayConfig{})
		want := eng.Report(true)
		got.Skipped, want.Skipped = 0, 0
		sameJSON(t, "after from_now", got, want)
	})

	t.Run("skip by time", func(t *testing.T) {
		r := start(t, testConfig(t, t.TempDir()))
		v := checkpointAt(t, r, 500)
		r.post(t, "", lines[500:])
		r.waitCovered(t, int64(n))
		from, to := "2026-03-01T16:00:00Z", "2026-03-01T22:00:00Z"
		restore(t, r, v, fmt.Sprintf(`{"resume":"skip","skip_from_time":%q,"skip_to_time":%q}`, from, to))
		got := r.waitCovered(t, int64(n))
		// The reference leaves out exactly the events in [from, to).
		var kept [][]byte
		var ev learner.Event
		f, _ := time.Parse(time.RFC3339, from)
		u, _ := time.Parse(time.RFC3339, to)
		skipped := 0
		for _, l := range lines {
			learner.DecodeEvent(l, &ev)
			if ev.Time >= f.UnixNano() && ev.Time < u.UnixNano() {
				skipped++
				continue
			}
			kept = append(kept, l)
		}
		if got.Skipped != int64(skipped) || skipped != 6*12*3 {
			t.Errorf("skipped %d events, want the %d of six hours × three rooms", got.Skipped, skipped)
		}
		want := replayReport(t, cfg, kept)
		// Positions differ (the skipped events keep theirs); the learners must not.
		sameJSON(t, "learners after skip", stripPositions(got.Learners), stripPositions(want.Learners))
		row := []byte(`{"key":"room-b","time":"2026-03-02T12:00:00Z","features":{"outdoor_c":14.2,"door_min":2,"shift":"day"}}`)
		for _, name := range serviceSpecs {
			code, b := r.call(t, "POST", "/v1/predict", "", []byte(fmt.Sprintf(`{"learner":%q,"rows":[%s]}`, name, row)))
			if code != 200 {
				t.Fatalf("predict %s: %d %s", name, code, b)
			}
			var resp PredictResponse
			json.Unmarshal(b, &resp)
			refEng, _ := learner.NewEngine(cfg)
			replay.Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(kept, []byte("\n")), '\n'))), refEng, replay.ReplayConfig{})
			var ev learner.Event
			learner.DecodeRow(row, &ev)
			p, _ := refEng.Predict("room-b", name, &ev)
			if resp.Predictions[0].Prediction != p.Value {
				t.Errorf("%s: predicts %v after the skip, a run that never saw the burst %v", name, resp.Predictions[0].Prediction, p.Value)
			}
		}
	})
}

func stripPositions(ls []learner.LearnerReport) []learner.LearnerReport {
	out := make([]learner.LearnerReport, len(ls))
	for i, l := range ls {
		if l.Drift.LastAlarm != nil {
			a := *l.Drift.LastAlarm
			a.Position = learner.Position{}
			l.Drift.LastAlarm = &a
		}
		out[i] = l
	}
	return out
}

func TestAuthOnEveryChangingEndpoint(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.Token = "s3cret-token"
	r := start(t, cfg)
	r.post(t, "s3cret-token", scenario(t, 1)[:50])
	r.waitCovered(t, 50)
	changing := []struct{ method, path, body string }{
		{"POST", "/v1/events", `{"features":{"a":1},"target":1}`},
		{"POST", "/v1/checkpoints", ``},
		{"POST", "/v1/checkpoints/1/restore", `{"resume":"from_now"}`},
	}
	// Every other changing route the server serves, found from its routes.
	for _, rt := range r.svc.routes() {
		path := strings.NewReplacer(":version", "1", ":name", "x").Replace(rt.Path)
		if rt.Method != "POST" || path == "/v1/predict" || slices.ContainsFunc(changing, func(c struct{ method, path, body string }) bool { return c.path == path }) {
			continue
		}
		changing = append(changing, struct{ method, path, body string }{"POST", path, `{}`})
	}
	for _, c := range changing {
		for _, tok := range []string{"", "wrong", "s3cret-tokenX"} {
			code, b := r.call(t, c.method, c.path, tok, []byte(c.body))
			if code != 401 || !strings.Contains(string(b), "Bearer") {
				t.Errorf("%s %s with token %q: %d %s, want 401", c.method, c.path, tok, code, b)
			}
		}
	}
	for _, path := range []string{"/v1/learners", "/v1/checkpoints", "/healthz", "/metrics", "/v1/openapi.json"} {
		if code, _ := r.call(t, "GET", path, "", nil); code != 200 {
			t.Errorf("GET %s without token: %d, want 200 (reads are open)", path, code)
		}
	}
	if code, b := r.call(t, "POST", "/v1/checkpoints", "s3cret-token", nil); code != 201 {
		t.Errorf("POST /v1/checkpoints with the token: %d %s", code, b)
	}
}

func TestBadRequestsSayWhatToFix(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.BodyLimit = 64 << 10
	cfg.MinScored = 20
	r := start(t, cfg)
	r.post(t, "", scenario(t, 1)[:30])
	r.waitCovered(t, 30)
	big := bytes.Repeat([]byte(`{"features":{"outdoor_c":1,"door_min":1,"shift":"day"},"target":1}`+"\n"), 2000)
	cases := []struct {
		method, path, body string
		code               int
		says               string
	}{
		{"POST", "/v1/events", string(big), 413, "limit of 65536 bytes"},
		{"POST", "/v1/events", "", 400, "body is empty"},
		{"POST", "/v1/events", "[1,", 400, "not a JSON array"},
		{"POST", "/v1/events", `{"features":{}}`, 400, "target is missing"},
		{"POST", "/v1/predict", "nonsense", 400, "not a JSON object"},
		{"POST", "/v1/predict", `{"learner":"tree","key":"room-a","features":{}}`, 404, "unknown learner"},
		{"POST", "/v1/predict", `{"key":"room-z","features":{}}`, 404, "no events yet"},
		{"POST", "/v1/predict", `{"key":"room-a","time":"2026-03-01T01:00:00Z","features":{"door_min":1,"shift":"day"}}`, 400, `"outdoor_c" is missing`},
		{"POST", "/v1/predict", `{"key":"room-a","time":"2026-03-01T01:00:00Z","features":{"outdoor_c":"hot","door_min":1,"shift":"day"}}`, 400, "must be a number"},
		{"POST", "/v1/predict", `{"key":"room-a","time":"2026-03-01T01:00:00Z","features":{"outdoor_c":3,"door_min":1,"shift":"day"}}`, 409, "answers after 20"},
		{"POST", "/v1/predict", `{"rows":[]}`, 400, "rows is empty"},
		{"POST", "/v1/checkpoints/99/restore", `{"resume":"from_now"}`, 404, "does not exist"},
		{"POST", "/v1/checkpoints/1/restore", `{"resume":"later"}`, 400, "from_checkpoint, from_now or skip"},
		{"POST", "/v1/checkpoints/1/restore", `{"resume":"skip"}`, 400, "skip_from_time"},
		{"POST", "/v1/checkpoints/1/restore", `{"resume":"from_now","extra":1}`, 400, "unknown field"},
		{"POST", "/v1/checkpoints/x/restore", `{}`, 400, "positive integer"},
		{"GET", "/v1/learners/tree/curve", "", 404, "no learner named"},
	}
	for _, c := range cases {
		code, b := r.call(t, c.method, c.path, "", []byte(c.body))
		var msg struct{ Message string }
		json.Unmarshal(b, &msg)
		if code != c.code || !strings.Contains(msg.Message, c.says) {
			t.Errorf("%s %s %.40q: %d %s; want %d with a message saying %q", c.method, c.path, c.body, code, b, c.code, c.says)
		}
	}
}

func TestOpenAPICoversEveryRoute(t *testing.T) {
	r := start(t, testConfig(t, t.TempDir()))
	code, b := r.call(t, "GET", "/v1/openapi.json", "", nil)
	if code != 200 {
		t.Fatal(code)
	}
	var doc struct {
		OpenAPI string                                `json:"openapi"`
		Paths   map[string]map[string]json.RawMessage `json:"paths"`
	}
	if err := json.Unmarshal(b, &doc); err != nil || !strings.HasPrefix(doc.OpenAPI, "3.") {
		t.Fatalf("not an OpenAPI 3 document: %v", err)
	}
	seen := map[string]bool{}
	for _, rt := range r.svc.routes() {
		path := openapiPath(rt.Path)
		seen[rt.Method+" "+path] = true
		if _, ok := doc.Paths[path][strings.ToLower(rt.Method)]; !ok {
			t.Errorf("route %s %s is not in openapi.json", rt.Method, path)
		}
	}
	for path, ops := range doc.Paths {
		for m := range ops {
			if !seen[strings.ToUpper(m)+" "+path] {
				t.Errorf("openapi.json documents %s %s, which the server does not serve", strings.ToUpper(m), path)
			}
		}
	}
}

func TestCurveAndMetrics(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.CurveEvery = 50
	r := start(t, cfg)
	r.post(t, "", scenario(t, 1)[:400])
	r.waitCovered(t, 400)
	code, b := r.call(t, "GET", "/v1/learners/rls:forget=0.99/curve", "", nil)
	var curve struct {
		Points []CurvePoint `json:"points"`
	}
	json.Unmarshal(b, &curve)
	if code != 200 || len(curve.Points) != 8 || curve.Points[7].Events != 400 {
		t.Errorf("curve: %d, %d points %s", code, len(curve.Points), b)
	}
	_, m := r.call(t, "GET", "/metrics", "", nil)
	for _, want := range []string{"tidemark_events_applied_total 400", `tidemark_learner_rmse{learner="mean:window=50",window="recent"}`,
		"tidemark_predict_duration_seconds_bucket", `tidemark_intake_lag_events{partition="0"} 0`, "tidemark_ready 1", "tidemark_checkpoint_version 1"} {
		if !strings.Contains(string(m), want) {
			t.Errorf("/metrics lacks %q", want)
		}
	}
}

// TestJournalTrimmedBehindRetainedCheckpoints: segments every retained
// checkpoint covers are deleted, and a restart still finds everything it needs.
func TestJournalTrimmedBehindRetainedCheckpoints(t *testing.T) {
	lines := scenario(t, 2)
	dir := t.TempDir()
	cfg := testConfig(t, dir)
	cfg.JournalSegmentBytes, cfg.CheckpointEvery, cfg.Retain = 8<<10, 100, 2
	r := start(t, cfg)
	for i := 0; i < len(lines); i += 25 { // small requests: many segments
		r.post(t, "", lines[i:min(i+25, len(lines))])
	}
	before := r.waitCovered(t, int64(len(lines)))
	r.call(t, "POST", "/v1/checkpoints", "", nil)
	segs, _ := filepath.Glob(filepath.Join(dir, "journal", "seg-*.wal"))
	var starts []int64
	for _, p := range segs {
		var n int64
		fmt.Sscanf(filepath.Base(p), "seg-%d.wal", &n)
		starts = append(starts, n)
	}
	_, b := r.call(t, "GET", "/v1/checkpoints", "", nil)
	var list []struct{ Position []learner.Position }
	json.Unmarshal(b, &list)
	oldest := int64(1 << 62)
	for _, c := range list {
		oldest = min(oldest, c.Position[0].Offset)
	}
	// Every segment wholly before the oldest retained checkpoint's next
	// offset is gone; the one holding it stays.
	if len(starts) == 0 || starts[0] > oldest+1 || (len(starts) > 1 && starts[1] <= oldest+1) {
		t.Errorf("segments start at %v; the oldest retained checkpoint covers offset %d", starts, oldest)
	}
	if starts[0] == 1 {
		t.Errorf("nothing was trimmed: segments start at %v", starts)
	}
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	r2 := start(t, cfg)
	sameJSON(t, "report after restart on a trimmed journal", r2.report(t), before)
	r2.post(t, "", lines[:10])
	r2.waitCovered(t, int64(len(lines)+10))
}

// TestOverview: the page's one source, GET /v1/overview, holds the status,
// the learners best recent error first with their curves over event time,
// the alarms and the checkpoints; GET / serves the page with a policy that
// keeps it to the service's own assets.
func TestOverview(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.CurveEvery = 20
	r := start(t, cfg)
	r.post(t, "", scenario(t, 1)[:300])
	rep := r.waitCovered(t, 300)
	r.call(t, "POST", "/v1/checkpoints", "", nil)
	code, b := r.call(t, "GET", "/v1/overview", "", nil)
	var o Overview
	if code != 200 || json.Unmarshal(b, &o) != nil {
		t.Fatalf("GET /v1/overview: %d %s", code, b)
	}
	if o.Status.Events != 300 || o.Status.Keys != 3 || len(o.Learners) != len(serviceSpecs) || len(o.Checkpoints) == 0 || o.Checkpoints[0].EventTimes == nil {
		t.Errorf("overview: %+v", o.Status)
	}
	for i, l := range o.Learners {
		if i > 0 && l.Recent.RMSE != nil && o.Learners[i-1].Recent.RMSE != nil && *l.Recent.RMSE < *o.Learners[i-1].Recent.RMSE {
			t.Errorf("learners not by recent rmse: %s after %s", l.Name, o.Learners[i-1].Name)
		}
		if len(l.Curve) != 15 || l.Curve[len(l.Curve)-1].Time == nil {
			t.Errorf("%s: %d curve points (want 300/20 = 15), the last with time %v", l.Name, len(l.Curve), l.Curve[len(l.Curve)-1].Time)
		}
		for _, want := range rep.Learners {
			if want.Name == l.Name && *want.Recent.RMSE != *l.Recent.RMSE {
				t.Errorf("%s: recent rmse %v, GET /v1/learners %v", l.Name, *l.Recent.RMSE, *want.Recent.RMSE)
			}
		}
	}
	if !strings.Contains(o.Caution, "not a safety system") {
		t.Errorf("caution: %q", o.Caution)
	}
	v := o.Checkpoints[0].Version
	for _, pin := range []bool{true, false} {
		code, b := r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/pin", v), "", []byte(fmt.Sprintf(`{"pinned":%t}`, pin)))
		var in checkpoint.Info
		if code != 200 || json.Unmarshal(b, &in) != nil || in.Version != v || in.Pinned != pin {
			t.Errorf("pin %t: %d %s", pin, code, b)
		}
	}
	if code, b := r.call(t, "POST", "/v1/checkpoints/999/pin", "", []byte(`{"pinned":true}`)); code != 404 {
		t.Errorf("pin of a missing checkpoint: %d %s", code, b)
	}
	req, _ := http.NewRequest("GET", r.base+"/", nil)
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	page, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != 200 || !strings.Contains(string(page), `src="/page.js"`) || !strings.Contains(resp.Header.Get("Content-Security-Policy"), "default-src 'none'") {
		t.Errorf("GET /: %d, policy %q", resp.StatusCode, resp.Header.Get("Content-Security-Policy"))
	}
	for _, asset := range []string{"/page.js", "/page.css"} {
		if code, _ := r.call(t, "GET", asset, "", nil); code != 200 {
			t.Errorf("GET %s: %d", asset, code)
		}
	}
}

func newCancel() (context.Context, context.CancelFunc) {
	return context.WithCancel(context.Background())
}

// TestListenFailureIsReported: an address in use is an error that says what
// to do, not a hang (Addr returns "" when Run could not listen).
func TestListenFailureIsReported(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	cfg := testConfig(t, t.TempDir())
	cfg.Listen = ln.Addr().String()
	svc, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	done := make(chan error, 1)
	go func() { done <- svc.Run(context.Background()) }()
	if a := svc.Addr(); a != "" {
		t.Errorf("Addr %q after a failed listen, want \"\"", a)
	}
	select {
	case err := <-done:
		if err == nil || !strings.Contains(err.Error(), "--listen") {
			t.Errorf("Run: %v, want an error suggesting --listen", err)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("Run did not return after a failed listen")
	}
}

// TestPredictRowsAnswerHasNoStrayRow: a {"rows": […]} answer carries its
// answers under predictions only; a one-row request carries its answer at
// the top level and no predictions (issue 10, defect 5: a multi-row answer
// also carried "key":"","prediction":0 at the top level).
func TestPredictRowsAnswerHasNoStrayRow(t *testing.T) {
	lines := scenario(t, 1)
	r := start(t, testConfig(t, t.TempDir()))
	r.post(t, "", lines)
	r.waitCovered(t, int64(len(lines)))
	row := `{"key":"room-a","time":"2026-03-02T12:00:00Z","features":{"outdoor_c":14.2,"door_min":2,"shift":"day"}}`
	code, b := r.call(t, "POST", "/v1/predict", "", []byte(`{"learner":"mean:window=50","rows":[`+row+`,`+row+`]}`))
	if code != 200 {
		t.Fatalf("rows: %d %s", code, b)
	}
	var m map[string]any
	json.Unmarshal(b, &m)
	for _, k := range []string{"key", "prediction", "interval", "recent_rmse", "events_trained", "events_scored"} {
		if _, ok := m[k]; ok {
			t.Errorf("a rows answer has a top-level %q: %s", k, b)
		}
	}
	if ps, _ := m["predictions"].([]any); len(ps) != 2 {
		t.Errorf("a rows answer has %d predictions, want 2: %s", len(ps), b)
	}
	code, b = r.call(t, "POST", "/v1/predict", "", []byte(`{"learner":"mean:window=50","key":"room-a","time":"2026-03-02T12:00:00Z","features":{"outdoor_c":14.2,"door_min":2,"shift":"day"}}`))
	m = nil
	json.Unmarshal(b, &m)
	if code != 200 || m["key"] != "room-a" || m["prediction"] == nil || m["predictions"] != nil {
		t.Errorf("one row: %d %s", code, b)
	}
}

// TestServeFromHistoryFile: a service whose source is a history file learns
// exactly what a replay of the file learns (the third source behind the one
// intake contract), and takes no events over HTTP.
func TestServeFromHistoryFile(t *testing.T) {
	lines := scenario(t, 2)
	path := filepath.Join(t.TempDir(), "history.ndjson")
	os.WriteFile(path, append(bytes.Join(lines, []byte("\n")), '\n'), 0o600)
	cfg := testConfig(t, t.TempDir())
	cfg.History = path
	r := start(t, cfg)
	got := r.waitCovered(t, int64(len(lines)))
	sameJSON(t, "service from a history file and replay", got, replayReport(t, engineConfig(t, serviceSpecs...), lines))
	if code, b := r.call(t, "POST", "/v1/events", "", lines[0]); code != 409 || !strings.Contains(string(b), "history file") {
		t.Errorf("POST /v1/events with a history source: %d %s, want 409", code, b)
	}
	r.waitStatus(t, "/readyz", 200)
}

// TestServeFromCSVAndParquetHistories: the service learns from the demo
// scenario written as CSV and as Parquet exactly as replay does from the
// same scenario in NDJSON, its broken rows refused at their positions and
// kept in the dead letters.
func TestServeFromCSVAndParquetHistories(t *testing.T) {
	dir := t.TempDir()
	var nd bytes.Buffer
	synth.Write(&nd, synth.Config{Days: 2, Seed: 9})
	lines := bytes.Split(bytes.TrimSuffix(nd.Bytes(), []byte("\n")), []byte("\n"))
	want := replayReport(t, engineConfig(t, serviceSpecs...), lines)
	for _, c := range []struct {
		name  string
		write func(io.Writer, synth.Config) (int, error)
	}{{"h.csv", synth.WriteCSV}, {"h.parquet", synth.WriteParquet}} {
		var b bytes.Buffer
		if _, err := c.write(&b, synth.Config{Days: 2, Seed: 9}); err != nil {
			t.Fatal(err)
		}
		path := filepath.Join(dir, c.name)
		os.WriteFile(path, b.Bytes(), 0o600)
		cfg := testConfig(t, t.TempDir())
		cfg.History = path
		r := start(t, cfg)
		got := r.waitCovered(t, int64(len(lines)))
		sameJSON(t, "service from "+c.name+" and replay of the NDJSON", got, want)
		if got.Rejected == 0 {
			t.Errorf("%s: the scenario's broken rows were not refused", c.name)
		}
		r.stop()
		dead, _ := os.ReadFile(filepath.Join(cfg.DataDir, "deadletters.ndjson"))
		if bytes.Count(dead, []byte("\n")) != int(got.Rejected) {
			t.Errorf("%s: %d dead letters for %d refused rows", c.name, bytes.Count(dead, []byte("\n")), got.Rejected)
		}
	}
}

// TestServeFromHistoryRejectsLongLineByPosition: a history line past the
// line limit is rejected at its line, with a reason that says so, and the
// lines after it are learned.
func TestServeFromHistoryRejectsLongLineByPosition(t *testing.T) {
	lines := scenario(t, 1)[:20]
	long := []byte(`{"target":1,"key":"` + strings.Repeat("x", intake.MaxLineBytes+10) + `"}`)
	all := append(append(append([][]byte{}, lines[:10]...), long), lines[10:]...)
	path := filepath.Join(t.TempDir(), "history.ndjson")
	os.WriteFile(path, append(bytes.Join(all, []byte("\n")), '\n'), 0o600)
	cfg := testConfig(t, t.TempDir())
	cfg.History = path
	r := start(t, cfg)
	rep := r.waitCovered(t, 21)
	if rep.Events != 20 || rep.Rejected != 1 {
		t.Errorf("%d applied, %d rejected; want 20 and 1", rep.Events, rep.Rejected)
	}
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	b, _ := os.ReadFile(filepath.Join(cfg.DataDir, "deadletters.ndjson"))
	if !strings.Contains(string(b), `"offset":11`) || !strings.Contains(string(b), "longer than") {
		t.Errorf("dead letters: %.300s; want line 11 named as too long", b)
	}
}

// TestPredictSaysWhichLearner: a predict that names no learner is answered
// by the service's default learner (the first configured, or the one set),
// and the answer says so; one that names a learner says it was asked.
func TestPredictSaysWhichLearner(t *testing.T) {
	for _, def := range []string{"", serviceSpecs[1]} {
		cfg := testConfig(t, t.TempDir())
		cfg.DefaultLearner = def
		r := start(t, cfg)
		r.post(t, "", scenario(t, 1)[:400])
		r.waitCovered(t, 400)
		want := def
		if want == "" {
			want = serviceSpecs[0]
		}
		row := `{"key":"room-a","time":"2026-03-01T20:00:00Z","features":{"outdoor_c":6.5,"door_min":0,"shift":"night"}}`
		for _, c := range []struct{ body, learner, chosen string }{
			{row, want, "default"},
			{`{"learner":"mean:window=50","rows":[` + row + `]}`, "mean:window=50", "request"},
		} {
			code, b := r.call(t, "POST", "/v1/predict", "", []byte(c.body))
			var resp PredictResponse
			if code != 200 || json.Unmarshal(b, &resp) != nil || resp.Learner != c.learner || resp.LearnerChosen != c.chosen {
				t.Errorf("default %q, body %s: %d %s; want learner %q chosen %q", def, c.body, code, b, c.learner, c.chosen)
			}
		}
	}
}

// TestRestoreRefusesASkipItsCheckpointHolds: a skip whose range begins at
// or before the latest event the checkpoint applied cannot leave those
// events out; it is refused (409), naming the newest checkpoint from before
// the range, which is then accepted. The same for a position range. The
// listing says what each checkpoint covers in event time.
func TestRestoreRefusesASkipItsCheckpointHolds(t *testing.T) {
	lines := scenario(t, 2)
	r := start(t, testConfig(t, t.TempDir()))
	posted := 0
	take := func(upTo int) checkpoint.Info {
		r.post(t, "", lines[posted:upTo])
		posted = upTo
		r.waitCovered(t, int64(upTo))
		code, b := r.call(t, "POST", "/v1/checkpoints", "", nil)
		var info checkpoint.Info
		if code != 201 || json.Unmarshal(b, &info) != nil {
			t.Fatalf("POST /v1/checkpoints: %d %s", code, b)
		}
		return info
	}
	before := take(600) // 200 readings of each room: up to 2026-03-01T16:35
	after := take(1200)
	// The demo scenario's readings are every five minutes per room from
	// 2026-03-01T00:00 (bench/synth): the 600th line is at 16:35.
	if before.EventTimes == nil || before.EventTimes.First != synthStart() || before.EventTimes.Last.Format(time.RFC3339) != "2026-03-01T16:35:00Z" {
		t.Errorf("checkpoint %d covers %+v, want 2026-03-01T00:00 to 16:35", before.Version, before.EventTimes)
	}
	// What the refusal should name: the newest checkpoint listed whose
	// events end before the range (periodic ones were taken too).
	from := time.Date(2026, 3, 1, 18, 0, 0, 0, time.UTC)
	code, b := r.call(t, "GET", "/v1/checkpoints", "", nil)
	var list []checkpoint.Info
	json.Unmarshal(b, &list)
	var meant uint64
	for _, in := range list {
		if in.EventTimes != nil && in.EventTimes.Last.Before(from) && in.Version > meant {
			meant = in.Version
		}
	}
	if meant < before.Version {
		t.Fatalf("listing %s: no checkpoint before the range", b)
	}
	skip := `{"resume":"skip","skip_from_time":"2026-03-01T18:00:00Z","skip_to_time":"2026-03-01T20:00:00Z"}`
	code, b = r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", after.Version), "", []byte(skip))
	if code != 409 || !strings.Contains(string(b), fmt.Sprintf("version %d is the newest", meant)) {
		t.Errorf("a skip inside the checkpoint's events: %d %s, want 409 naming version %d", code, b, meant)
	}
	pos := `{"resume":"skip","skip_positions":[{"partition":0,"from":700,"to":800}]}`
	code, b = r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", after.Version), "", []byte(pos))
	if code != 409 || !strings.Contains(string(b), "version") || !strings.Contains(string(b), "offset 1200") {
		t.Errorf("a skip of positions the checkpoint holds: %d %s, want 409 naming an earlier version", code, b)
	}
	// A dry run counts, and changes nothing: the hand count is the lines
	// after the checkpoint's position, those in the range skipped.
	var ckAt int64
	for _, in := range list {
		if in.Version == meant {
			ckAt = in.Position[0].Offset
		}
	}
	wantSkip := 0
	for _, l := range lines[ckAt:1200] {
		var ev learner.Event
		if learner.DecodeEvent(l, &ev) == nil && !time.Unix(0, ev.Time).Before(from) && time.Unix(0, ev.Time).Before(from.Add(2*time.Hour)) {
			wantSkip++
		}
	}
	dry := strings.Replace(skip, `{`, `{"dry_run":true,`, 1)
	code, b = r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", meant), "", []byte(dry))
	var pv RestorePreview
	if code != 200 || json.Unmarshal(b, &pv) != nil || pv.Skip != int64(wantSkip) || pv.Replay+pv.Skip != 1200-ckAt || !pv.DryRun || wantSkip == 0 {
		t.Errorf("dry run: %d %s; want %d skipped of %d", code, b, wantSkip, 1200-ckAt)
	}
	if rep := r.report(t); rep.Events+rep.Rejected != 1200 || rep.Skipped != 0 {
		t.Errorf("a dry run changed the state: %d events, %d skipped", rep.Events, rep.Skipped)
	}
	// A range that selects no event is refused.
	none := `{"resume":"skip","skip_from_time":"2027-01-01T00:00:00Z","skip_to_time":"2027-01-02T00:00:00Z"}`
	if code, b := r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", meant), "", []byte(none)); code != 409 || !strings.Contains(string(b), "selects no event") {
		t.Errorf("a skip that selects nothing: %d %s", code, b)
	}
	if code, b := r.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", meant), "", []byte(skip)); code != 200 {
		t.Errorf("the skip from the checkpoint before the range: %d %s", code, b)
	}
}

func synthStart() time.Time { return time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC) }

// TestCurvesSurviveARestart: the error curves and alarms are kept with the
// checkpoints, so that a restarted service shows the same curve (and,
// resumed from an older checkpoint, none of the points after it).
func TestCurvesSurviveARestart(t *testing.T) {
	dir := t.TempDir()
	cfg := testConfig(t, dir)
	cfg.CurveEvery = 20
	r := start(t, cfg)
	r.post(t, "", scenario(t, 1)[:300])
	r.waitCovered(t, 300)
	curve := func(r *running) []CurvePoint {
		code, b := r.call(t, "GET", "/v1/learners/"+serviceSpecs[1]+"/curve", "", nil)
		var c struct{ Points []CurvePoint }
		if code != 200 || json.Unmarshal(b, &c) != nil {
			t.Fatalf("curve: %d %s", code, b)
		}
		return c.Points
	}
	before := curve(r)
	if len(before) != 15 {
		t.Fatalf("%d points before the restart, want 300/20 = 15", len(before))
	}
	if err := r.stop(); err != nil { // a shutdown checkpoint
		t.Fatal(err)
	}
	r = start(t, cfg)
	sameJSON(t, "the curve after a restart", curve(r), before)
}

// TestPredictQuotesTheIntervalAsked: predict quotes the conformal interval
// by default and the normal one when configured, each at the engine's level
// and equal to what an engine replayed over the same events quotes (the
// methods themselves are checked in learner: TestQuantileTrackingBound,
// TestConformalHoldsAfterAShift, TestIntervalCoverage).
func TestPredictQuotesTheIntervalAsked(t *testing.T) {
	lines := scenario(t, 1)[:400]
	ref, _ := learner.NewEngine(engineConfig(t, serviceSpecs...))
	replay.Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(lines, []byte("\n")), '\n'))), ref, replay.ReplayConfig{})
	row := `{"learner":"rls:forget=0.99","key":"room-a","time":"2026-03-01T20:00:00Z","features":{"outdoor_c":6.5,"door_min":0,"shift":"night"}}`
	var ev learner.Event
	learner.DecodeRow([]byte(row), &ev)
	want, err := ref.Predict("room-a", "rls:forget=0.99", &ev)
	if err != nil || want.Conformal == nil || want.Normal == nil {
		t.Fatalf("reference: %+v %v", want, err)
	}
	for _, c := range []struct {
		method string
		half   float64
	}{{IntervalConformal, *want.Conformal}, {IntervalNormal, *want.Normal}} {
		cfg := testConfig(t, t.TempDir())
		if c.method == IntervalNormal {
			cfg.Interval = c.method
		}
		r := start(t, cfg)
		r.post(t, "", lines)
		r.waitCovered(t, int64(len(lines)))
		code, b := r.call(t, "POST", "/v1/predict", "", []byte(row))
		var resp PredictResponse
		if code != 200 || json.Unmarshal(b, &resp) != nil || resp.PredictAnswer == nil || resp.Interval == nil {
			t.Fatalf("%s: %d %s", c.method, code, b)
		}
		in := resp.Interval
		if in.Method != c.method || in.Level != learner.DefaultLevel || in.Low != want.Value-c.half || in.High != want.Value+c.half {
			t.Errorf("%s: interval %+v, want %v ± %v at %v", c.method, *in, want.Value, c.half, learner.DefaultLevel)
		}
	}
}

// TestPredictAsksTheLeader: with a per-key leader kept, a predict that asks
// for "leader" is answered by the learner leading on the key, named in the
// answer, equal to an engine replayed over the same events; without a
// leader kept the request is refused and says why.
func TestPredictAsksTheLeader(t *testing.T) {
	lines := scenario(t, 1)[:400]
	ecfg := engineConfig(t, serviceSpecs...)
	ecfg.Leader.On = true
	ref, _ := learner.NewEngine(ecfg)
	replay.Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(lines, []byte("\n")), '\n'))), ref, replay.ReplayConfig{})
	lead, ok := ref.Leader("room-a")
	if !ok {
		t.Fatal("no leader on room-a in the reference")
	}
	row := `{"key":"room-a","time":"2026-03-01T20:00:00Z","features":{"outdoor_c":6.5,"door_min":0,"shift":"night"}}`
	var ev learner.Event
	learner.DecodeRow([]byte(row), &ev)
	want, _ := ref.Predict("room-a", lead, &ev)
	cfg := testConfig(t, t.TempDir())
	cfg.Engine = ecfg
	r := start(t, cfg)
	r.post(t, "", lines)
	r.waitCovered(t, int64(len(lines)))
	code, b := r.call(t, "POST", "/v1/predict", "", []byte(`{"learner":"leader",`+row[1:]))
	var resp PredictResponse
	if code != 200 || json.Unmarshal(b, &resp) != nil || resp.PredictAnswer == nil || resp.LearnerChosen != "leader" ||
		resp.PredictAnswer.AnsweredBy != lead || resp.Prediction != want.Value {
		t.Errorf("predict the leader: %d %s; want %s's %v", code, b, lead, want.Value)
	}
	r2 := start(t, testConfig(t, t.TempDir()))
	r2.post(t, "", lines[:50])
	r2.waitCovered(t, 50)
	if code, b := r2.call(t, "POST", "/v1/predict", "", []byte(`{"learner":"leader",`+row[1:])); code != 404 || !strings.Contains(string(b), "--leader") {
		t.Errorf("the leader without one kept: %d %s", code, b)
	}
}
