package api

import (
	"bufio"
	"bytes"
	"net/http"
	"net/http/httptest"
	"os"
	"testing"
)

// FuzzPredictRequest sends arbitrary bodies to POST /v1/predict on a service
// that has learned a day of the scenario: every answer is 200 or a 4xx with
// a JSON message, never a 5xx or a panic. Seeds: testdata/hostile-events.ndjson.
func FuzzPredictRequest(f *testing.F) {
	if file, err := os.Open("../testdata/hostile-events.ndjson"); err == nil {
		sc := bufio.NewScanner(file)
		for sc.Scan() {
			f.Add(append([]byte(nil), sc.Bytes()...))
		}
		file.Close()
	}
	f.Add([]byte(`{"key":"room-a","time":"2026-03-01T12:00:00Z","features":{"outdoor_c":10,"door_min":1,"shift":"day"}}`))
	f.Add([]byte(`{"learner":"mean:window=50","rows":[{"key":"room-b","features":{"outdoor_c":1,"door_min":0,"shift":"x"}}]}`))
	cfg := testConfig(f, f.TempDir())
	svc, err := New(cfg)
	if err != nil {
		f.Fatal(err)
	}
	r := startFuzz(f, svc)
	lines := scenario(f, 1)
	resp, err := http.Post(r+"/v1/events", "application/x-ndjson", bytes.NewReader(bytes.Join(lines, []byte("\n"))))
	if err != nil {
		f.Fatal(err)
	}
	resp.Body.Close()
	h := svc.Handler()
	f.Fuzz(func(t *testing.T, body []byte) {
		rec := httptest.NewRecorder()
		req := httptest.NewRequest("POST", "/v1/predict", bytes.NewReader(body))
		req.Host = "127.0.0.1" // httptest's example.com would be refused by the host guard
		h.ServeHTTP(rec, req)
		if rec.Code >= 500 || rec.Code == http.StatusForbidden || (rec.Code != 200 && !bytes.Contains(rec.Body.Bytes(), []byte(`"message"`))) {
			t.Fatalf("%q: %d %s", body, rec.Code, rec.Body.Bytes())
		}
	})
}

func startFuzz(f *testing.F, svc *Service) string {
	ctx, cancel := newCancel()
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	f.Cleanup(func() { cancel(); <-done })
	return "http://" + svc.Addr()
}
