package api

import (
	"io"
	"net/http"
	"strings"
	"testing"
)

// raw sends a request with exactly the given headers (Host included) over
// real HTTP and returns the status and body.
func (r *running) raw(t *testing.T, method, path string, headers map[string]string, body string) (int, string) {
	t.Helper()
	req, _ := http.NewRequest(method, r.base+path, strings.NewReader(body))
	for k, v := range headers {
		if k == "Host" {
			req.Host = v
			continue
		}
		req.Header.Set(k, v)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// TestCrossSiteRequestsRefused: what a hostile web page in the operator's
// browser can send — a form post (text/plain, urlencoded, multipart) whose
// body parses as a restore or as events, a request from another Origin, a
// request under a rebinding host name — changes nothing (issue 11, hole 4).
func TestCrossSiteRequestsRefused(t *testing.T) {
	r := start(t, testConfig(t, t.TempDir()))
	lines := scenario(t, 1)
	r.post(t, "", lines[:300])
	before := r.waitCovered(t, 300)
	if code, b := r.call(t, "POST", "/v1/checkpoints", "", nil); code != 201 {
		t.Fatalf("checkpoint: %d %s", code, b)
	}
	self := strings.TrimPrefix(r.base, "http://")
	restore := `{"resume":"from_now"}=` // what a text/plain form with that field name sends
	for _, tc := range []struct {
		name    string
		path    string
		headers map[string]string
		body    string
		want    int
	}{
		{"text/plain form restore", "/v1/checkpoints/1/restore", map[string]string{"Content-Type": "text/plain"}, restore, 415},
		{"urlencoded form restore", "/v1/checkpoints/1/restore", map[string]string{"Content-Type": "application/x-www-form-urlencoded"}, restore, 415},
		{"multipart form events", "/v1/events", map[string]string{"Content-Type": "multipart/form-data; boundary=x"}, string(lines[300]), 415},
		{"text/plain form events", "/v1/events", map[string]string{"Content-Type": "text/plain"}, string(lines[300]), 415},
		{"form checkpoint", "/v1/checkpoints", map[string]string{"Content-Type": "application/x-www-form-urlencoded"}, "a=b", 415},
		{"foreign origin restore", "/v1/checkpoints/1/restore", map[string]string{"Content-Type": "application/json", "Origin": "http://evil.example"}, `{"resume":"from_now"}`, 403},
		{"null origin events", "/v1/events", map[string]string{"Content-Type": "application/x-ndjson", "Origin": "null"}, string(lines[300]), 403},
		{"trailing data restore", "/v1/checkpoints/1/restore", map[string]string{"Content-Type": "application/json"}, restore, 400},
		{"rebinding host events", "/v1/events", map[string]string{"Content-Type": "application/x-ndjson", "Host": "evil.example:8080"}, string(lines[300]), 403},
		{"rebinding host read", "/v1/learners", map[string]string{"Host": "evil.example"}, "", 403},
	} {
		method := "POST"
		if tc.body == "" {
			method = "GET"
		}
		code, b := r.raw(t, method, tc.path, tc.headers, tc.body)
		if code != tc.want {
			t.Errorf("%s: %d %s, want %d", tc.name, code, b, tc.want)
		}
	}
	after := r.report(t)
	if after.Events != before.Events {
		t.Errorf("events applied %d after the cross-site attempts, %d before", after.Events, before.Events)
	}
	sameJSON(t, "learners after the cross-site attempts", after.Learners, before.Learners)
	// The service's own origin, localhost, and a plain tool are served.
	for _, h := range []map[string]string{
		{"Content-Type": "application/json", "Origin": "http://" + self},
		{"Content-Type": "application/json", "Host": strings.Replace(self, "127.0.0.1", "localhost", 1)},
		{},
	} {
		if code, b := r.raw(t, "POST", "/v1/checkpoints", h, ""); code != 201 {
			t.Errorf("checkpoint with %v: %d %s", h, code, b)
		}
	}
}

// TestAllowedHostsAndOrigins: names and origins given in the configuration
// are served.
func TestAllowedHostsAndOrigins(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.AllowedHosts = []string{"tidemark.internal"}
	cfg.AllowedOrigins = []string{"https://ops.example"}
	r := start(t, cfg)
	if code, b := r.raw(t, "GET", "/v1/learners", map[string]string{"Host": "Tidemark.Internal:8080"}, ""); code != 200 {
		t.Errorf("allowed host: %d %s", code, b)
	}
	if code, b := r.raw(t, "POST", "/v1/checkpoints", map[string]string{"Origin": "https://ops.example"}, ""); code != 201 {
		t.Errorf("allowed origin: %d %s", code, b)
	}
}

// TestNoTokenBeyondLoopbackRefused: without a token the service refuses to
// listen on an address other machines reach, unless told so explicitly.
func TestNoTokenBeyondLoopbackRefused(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.Listen = "0.0.0.0:0"
	if _, err := New(cfg); err == nil || !strings.Contains(err.Error(), "--insecure-open-network") {
		t.Errorf("listen on 0.0.0.0 without a token: %v, want an error naming --insecure-open-network", err)
	}
	cfg.Token = "s3cret-token"
	if svc, err := New(cfg); err != nil {
		t.Errorf("with a token: %v", err)
	} else {
		svc.close()
	}
	cfg.Token, cfg.InsecureOpenNetwork = "", true
	if svc, err := New(cfg); err != nil {
		t.Errorf("with --insecure-open-network: %v", err)
	} else {
		svc.close()
	}
}

// TestBearerSchemeCaseInsensitive: RFC 7235 §2.1 — the auth scheme is
// matched without regard to case.
func TestBearerSchemeCaseInsensitive(t *testing.T) {
	cfg := testConfig(t, t.TempDir())
	cfg.Token = "s3cret-token"
	r := start(t, cfg)
	for _, h := range []string{"Bearer s3cret-token", "bearer s3cret-token", "BEARER s3cret-token"} {
		if code, b := r.raw(t, "POST", "/v1/checkpoints", map[string]string{"Authorization": h}, ""); code != 201 {
			t.Errorf("%q: %d %s", h, code, b)
		}
	}
	for _, h := range []string{"Basic s3cret-token", "Bearer wrong", "Bearers3cret-token"} {
		if code, _ := r.raw(t, "POST", "/v1/checkpoints", map[string]string{"Authorization": h}, ""); code != 401 {
			t.Errorf("%q: %d, want 401", h, code)
		}
	}
}
