package main

import (
	"context"
	"net/http"
	"strings"
	"testing"
	"time"
)

// TestDemoSmoke moved here with the demo (it was api's): the demo runs the
// service and feeds it over HTTP; once ready, it answers predictions.
func TestDemoSmoke(t *testing.T) {
	var out strings.Builder
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var predicted, ready bool
	err := demo(ctx, demoConfig{Listen: "127.0.0.1:0", DataDir: t.TempDir(), Days: 3, Speed: 1e6, Every: time.Hour, Out: &out,
		Ready: func(base string) {
			resp, err := http.Get(base + "/readyz")
			ready = err == nil && resp.StatusCode == 200
			body := `{"learner":"rls-forget","key":"room-b","time":"2026-03-02T12:00:00Z","features":{"outdoor_c":14,"door_min":2,"shift":"day"}}`
			resp, err = http.Post(base+"/v1/predict", "application/json", strings.NewReader(body))
			predicted = err == nil && resp.StatusCode == 200
		}})
	if err != nil {
		t.Fatal(err)
	}
	if !ready || !predicted {
		t.Errorf("demo: ready %v, predict answered %v", ready, predicted)
	}
	for _, want := range []string{"page        http", "curl -s -H 'Content-Type: application/json' -d", "/restore", "the scenario is played out", "rls-forget", "shutdown checkpoint"} {
		if !strings.Contains(out.String(), want) {
			t.Errorf("demo output lacks %q:\n%s", want, out.String())
		}
	}
}
