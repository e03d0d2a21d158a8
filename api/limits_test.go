package api

import (
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// TestLimitAnswersSayWhichLimit: a 413 names the limit that was hit — rows,
// events or bytes (issue 11, hole 7: it always spoke of the byte limit).
func TestLimitAnswersSayWhichLimit(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.MaxRows = 5
	cfg.BodyLimit = 64 << 10
	r := start(t, cfg)
	lines := scenario(t, 1)
	r.post(t, "", lines[:5])
	r.waitCovered(t, 5)
	row := `{"key":"room-a","time":"2026-03-01T12:00:00Z","features":{"outdoor_c":10,"door_min":1,"shift":"day"}}`
	rows := "[" + strings.Repeat(row+",", 5) + row + "]"
	for _, tc := range []struct {
		name, path, body, want string
	}{
		{"six rows", "/v1/predict", `{"rows":` + rows + `}`, "6 rows, more than the limit of 5 rows"},
		{"six events", "/v1/events", strings.Join([]string{string(lines[5]), string(lines[6]), string(lines[7]), string(lines[8]), string(lines[9]), string(lines[10])}, "\n"), "6 events, more than the limit of 5 events"},
		{"too many bytes", "/v1/events", strings.Repeat(" ", 70<<10) + string(lines[5]), "request body larger than the limit of 65536 bytes"},
	} {
		code, b := r.call(t, "POST", tc.path, "", []byte(tc.body))
		if code != 413 || !strings.Contains(string(b), tc.want) {
			t.Errorf("%s: %d %s, want 413 saying %q", tc.name, code, b, tc.want)
		}
	}
	// {"rows":null} is not a single row.
	if code, b := r.call(t, "POST", "/v1/predict", "", []byte(`{"rows":null}`)); code != 400 || !strings.Contains(string(b), "rows must be an array") {
		t.Errorf(`{"rows":null}: %d %s, want 400`, code, b)
	}
}

// TestExistingDataDirectoryMadePrivate: a data directory readable by other
// users is made 0700 at start (its journal and checkpoints too).
func TestExistingDataDirectoryMadePrivate(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "data")
	os.MkdirAll(filepath.Join(dir, "journal"), 0o755)
	os.Chmod(dir, 0o755)
	r := start(t, testConfig(t, dir))
	r.call(t, "GET", "/healthz", "", nil)
	for _, d := range []string{dir, filepath.Join(dir, "journal")} {
		st, err := os.Stat(d)
		if err != nil {
			t.Fatal(err)
		}
		if perm := st.Mode().Perm(); perm != 0o700 {
			t.Errorf("%s: mode %v, want 0700", d, perm)
		}
	}
}

// TestErrorAnswersHideDataPath: an error answer never shows where the
// service keeps its data.
func TestErrorAnswersHideDataPath(t *testing.T) {
	r, cfg, fail, _ := startWithCheckpoint(t, 50)
	fail.Store(true)
	for _, path := range []string{"/v1/checkpoints", "/v1/checkpoints/1/restore"} {
		code, b := r.call(t, "POST", path, "", []byte(`{"resume":"from_now"}`))
		if path == "/v1/checkpoints" {
			code, b = r.call(t, "POST", path, "", nil)
		}
		if code < 400 {
			t.Errorf("%s with a failing disk: %d", path, code)
		}
		if strings.Contains(string(b), cfg.DataDir) || strings.Contains(string(b), os.TempDir()) {
			t.Errorf("%s answer shows the data path: %s", path, b)
		}
	}
}

// TestTokenForReads: with TokenForReads the reads need the token too;
// health, readiness and the API description stay open.
func TestTokenForReads(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.Token, cfg.TokenForReads = "s3cret-token", true
	r := start(t, cfg)
	for _, p := range []string{"/v1/learners", "/v1/checkpoints", "/metrics", "/", "/v1/learners/mean:window=50/curve"} {
		if code, _ := r.call(t, "GET", p, "", nil); code != 401 {
			t.Errorf("GET %s without the token: %d, want 401", p, code)
		}
		if code, b := r.call(t, "GET", p, "s3cret-token", nil); code != 200 {
			t.Errorf("GET %s with the token: %d %s", p, code, b)
		}
	}
	for _, p := range []string{"/healthz", "/v1/openapi.json"} {
		if code, _ := r.call(t, "GET", p, "", nil); code != 200 {
			t.Errorf("GET %s: %d, want 200 without a token", p, code)
		}
	}
}

// TestReadyMaxLag: with a lag bound, /readyz reports not ready while more
// events than the bound wait to be applied.
func TestReadyMaxLag(t *testing.T) {
	dir := t.TempDir()
	journalWith(t, dir, scenario(t, 3)) // 2 592 events waiting at start
	cfg := testConfig(t, dir)
	cfg.ReadyMaxLag = 100
	// A slow consumer: many learners, so that the backlog is seen.
	cfg.Engine = engineConfig(t, "knn:k=5,window=2000", "knn:k=7,window=2000", "knn:k=9,window=2000", "mean:window=50")
	svc, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	// Before the loop runs, the whole backlog waits.
	svc.loop.ready.Store(true)
	svc.loop.publish() // readers see the published snapshot
	code, b := callHandler(svc, "GET", "/readyz")
	if code != 503 || !strings.Contains(b, "wait to be applied") {
		t.Errorf("/readyz with %d events waiting and a bound of 100: %d %s", 2592, code, b)
	}
	svc.close()
	// Running, it becomes ready once the backlog is within the bound.
	r := start(t, cfg)
	r.waitCovered(t, 2592)
	deadline := time.Now().Add(10 * time.Second)
	for {
		if code, _ := r.call(t, "GET", "/readyz", "", nil); code == 200 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("not ready after catching up")
		}
		time.Sleep(10 * time.Millisecond)
	}
}

// callHandler serves one request with the service's handler directly.
func callHandler(s *Service, method, path string) (int, string) {
	rec := httptest.NewRecorder()
	req := httptest.NewRequest(method, path, nil)
	req.Host = "127.0.0.1"
	s.Handler().ServeHTTP(rec, req)
	return rec.Code, rec.Body.String()
}
