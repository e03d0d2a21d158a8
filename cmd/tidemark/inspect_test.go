package main

import (
	"io"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
)

// TestInspectingCommandsBesideRunningService: `checkpoints list`, `show` and
// `verify` run in a loop against the store of a running `tidemark serve`
// while it takes checkpoints on demand. Every POST /v1/checkpoints must
// succeed and the inspecting commands must leave the directory as they found
// it (issue 11, hole 1: they used to remove the service's temporary file in
// flight; 28 of 40 checkpoints failed).
func TestInspectingCommandsBesideRunningService(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the binary")
	}
	bin := buildBinary(t)
	dir := t.TempDir()
	p := startServe(t, bin, dir, freePort(t), "--checkpoint-every", "1000000")
	defer p.kill()
	var body strings.Builder
	for i := 0; i < 200; i++ {
		body.WriteString(crashEvent(i) + "\n")
	}
	if resp, err := http.Post(p.base+"/v1/events", "application/x-ndjson", strings.NewReader(body.String())); err != nil || resp.StatusCode != 200 {
		t.Fatalf("post events: %v %v", resp, err)
	}
	store := filepath.Join(dir, "checkpoints")
	stop := make(chan struct{})
	var wg sync.WaitGroup
	var runs atomic.Int64
	// repeat runs f until stop is closed, on a goroutine of its own.
	repeat := func(f func()) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for {
				select {
				case <-stop:
					return
				default:
				}
				f()
				runs.Add(1)
			}
		}()
	}
	for _, sub := range []string{"list", "verify", "show"} {
		args := []string{"checkpoints", sub, store}
		if sub == "show" {
			args = append(args, "1")
		}
		repeat(func() { run(args, io.Discard, io.Discard) })
	}
	// And the real binary, as an operator's shell loop would run it.
	repeat(func() { exec.Command(bin, "checkpoints", "list", store).Run() })
	failed := 0
	for i := 0; i < 40; i++ {
		resp, err := http.Post(p.base+"/v1/checkpoints", "application/json", nil)
		if err != nil {
			t.Fatal(err)
		}
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		if resp.StatusCode != 201 {
			failed++
			t.Errorf("checkpoint %d: %d %s", i, resp.StatusCode, b)
		}
	}
	close(stop)
	wg.Wait()
	t.Logf("40 checkpoints on demand, %d failed, beside %d inspecting commands", failed, runs.Load())
	// Inspecting a store changes nothing, not even a lock file.
	missing := filepath.Join(dir, "no-such-store")
	for _, sub := range [][]string{{"list"}, {"verify"}, {"pin", "1"}} {
		args := append([]string{"checkpoints", sub[0], missing}, sub[1:]...)
		if code := run(args, io.Discard, io.Discard); code == 0 {
			t.Errorf("checkpoints %s of a missing directory exited 0", sub[0])
		}
	}
	if _, err := os.Stat(missing); !os.IsNotExist(err) {
		t.Error("a checkpoints command created the directory it was pointed at")
	}
}
