package main

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"tidemark/api"
	"tidemark/learner"
)

// Issue 13's cases of rejected events, through the whole service: a flood
// of them against accepted ones, and a restore that skips them against one
// that replays them.

// rejectFlood is issue 13's flood: the service reading a history of 300
// good events on 10 keys, then n events each of a new key past a cap of 10
// keys (rejected, written to the dead letters), against the same count of
// events all accepted. Both through the whole service (history intake,
// loop, dead letters, curve points every 100 applied events, publishing
// every 5 ms), timed until the published state covers the last position;
// in turn, three times, the best of each.
func rejectFlood() string {
	const n = 200_000
	dir, err := os.MkdirTemp("", "tidemark-flood")
	if err != nil {
		return "flood: " + err.Error()
	}
	defer os.RemoveAll(dir)
	write := func(name string, reject bool) (string, error) {
		path := filepath.Join(dir, name)
		f, err := os.Create(path)
		if err != nil {
			return "", err
		}
		w := bufio.NewWriter(f)
		t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
		for i := 0; i < 300+n; i++ {
			key := "room-" + strconv.Itoa(i%10)
			if reject && i >= 300 {
				key = "new-" + strconv.Itoa(i)
			}
			fmt.Fprintf(w, `{"time":%q,"key":%q,"features":{"x":%d},"target":%d}`+"\n", t0.Add(time.Duration(i)*time.Second).Format(time.RFC3339), key, i%7, i%5)
		}
		if err := w.Flush(); err != nil {
			return "", err
		}
		return path, f.Close()
	}
	good, err := write("good.ndjson", false)
	if err != nil {
		return "flood: " + err.Error()
	}
	bad, err := write("bad.ndjson", true)
	if err != nil {
		return "flood: " + err.Error()
	}
	run := func(history string) (float64, error) {
		spec, _ := learner.ParseSpec("rls:forget=0.995")
		cfg := api.Config{Listen: "127.0.0.1:0", DataDir: filepath.Join(dir, fmt.Sprint("data", time.Now().UnixNano())), History: history,
			PublishEvery: 5 * time.Millisecond, Engine: learner.Config{Learners: []learner.Spec{spec}, MaxKeys: 10}}
		svc, err := api.New(cfg)
		if err != nil {
			return 0, err
		}
		ctx, cancel := context.WithCancel(context.Background())
		done := make(chan error, 1)
		t0 := time.Now()
		go func() { done <- svc.Run(ctx) }()
		last := []learner.Position{{Partition: 0, Offset: 300 + n}}
		for {
			if _, ok := svc.Progress(last); ok {
				break
			}
			select {
			case err := <-done:
				cancel()
				return 0, fmt.Errorf("the service stopped: %v", err)
			case <-time.After(time.Millisecond):
			}
		}
		el := time.Since(t0).Seconds()
		cancel()
		<-done
		return float64(300+n) / el, nil
	}
	var best [2]float64
	for rep := 0; rep < 3; rep++ {
		for i, h := range []string{good, bad} {
			r, err := run(h)
			if err != nil {
				return "flood: " + err.Error()
			}
			best[i] = max(best[i], r)
		}
	}
	verdict := "ok"
	if best[1] < best[0]/2 {
		verdict = "MISSED"
	}
	return fmt.Sprintf("flood: the service reading 300 good events, then %d events of new keys past a cap of 10 (rejected, dead-lettered)\n"+
		"  all accepted: %8.0f events/s; the flood: %8.0f events/s; ratio %.2f (target ≥ 0.5): %s\n", n, best[0], best[1], best[1]/best[0], verdict)
}

// restoreSkip is issue 13's restore case: a history of 300 good events on
// 10 keys, then n events of new keys past a cap of 10 (rejected); the
// service checkpoints every 300 events and keeps them all. Restoring the checkpoint at 300 with
// resume "skip" over the n bad positions must cost what resume
// "from_checkpoint" (re-reading and re-rejecting them) costs. Each restore is
// timed from the request until the published state covers the last
// position again; the two kinds in turn, five times, the best of each.
func restoreSkip() string {
	const n = 30_000
	dir, err := os.MkdirTemp("", "tidemark-restore")
	if err != nil {
		return "restore: " + err.Error()
	}
	defer os.RemoveAll(dir)
	path := filepath.Join(dir, "history.ndjson")
	f, err := os.Create(path)
	if err != nil {
		return "restore: " + err.Error()
	}
	w := bufio.NewWriter(f)
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	for i := 0; i < 300+n; i++ {
		key := "room-" + strconv.Itoa(i%10)
		if i >= 300 {
			key = "new-" + strconv.Itoa(i)
		}
		fmt.Fprintf(w, `{"time":%q,"key":%q,"features":{"x":%d},"target":%d}`+"\n", t0.Add(time.Duration(i)*time.Second).Format(time.RFC3339), key, i%7, i%5)
	}
	w.Flush()
	f.Close()
	spec, _ := learner.ParseSpec("rls:forget=0.995")
	svc, err := api.New(api.Config{Listen: "127.0.0.1:0", DataDir: filepath.Join(dir, "data"), History: path, CheckpointEvery: 300, Retain: 1 << 20,
		PublishEvery: 5 * time.Millisecond, Engine: learner.Config{Learners: []learner.Spec{spec}, MaxKeys: 10}})
	if err != nil {
		return "restore: " + err.Error()
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	defer func() { cancel(); <-done }()
	last := []learner.Position{{Partition: 0, Offset: 300 + n}}
	wait := func() error {
		for deadline := time.Now().Add(2 * time.Minute); ; {
			if _, ok := svc.Progress(last); ok {
				return nil
			}
			if time.Now().After(deadline) {
				applied, _ := svc.Progress(last)
				return fmt.Errorf("the service did not catch up (%d applied)", applied)
			}
			time.Sleep(time.Millisecond)
		}
	}
	if err := wait(); err != nil {
		return "restore: " + err.Error()
	}
	// The checkpoint covering position 300.
	resp, err := http.Get("http://" + svc.Addr() + "/v1/checkpoints")
	if err != nil {
		return "restore: " + err.Error()
	}
	var list []struct {
		Version  uint64
		Position []learner.Position
	}
	json.NewDecoder(resp.Body).Decode(&list)
	resp.Body.Close()
	var v uint64
	for _, c := range list {
		if len(c.Position) == 1 && c.Position[0].Offset == 300 {
			v = c.Version
		}
	}
	if v == 0 {
		return fmt.Sprintf("restore: no checkpoint at position 300 in %+v", list)
	}
	bodies := []string{`{"resume":"from_checkpoint"}`,
		fmt.Sprintf(`{"resume":"skip","skip_positions":[{"partition":0,"from":301,"to":%d}]}`, 300+n)}
	best := [2]float64{math.Inf(1), math.Inf(1)}
	for rep := 0; rep < 5; rep++ {
		for i, body := range bodies {
			t0 := time.Now()
			resp, err := http.Post(fmt.Sprintf("http://%s/v1/checkpoints/%d/restore", svc.Addr(), v), "application/json", strings.NewReader(body))
			if err != nil {
				return "restore: " + err.Error()
			}
			b, _ := io.ReadAll(resp.Body)
			resp.Body.Close()
			if resp.StatusCode != 200 {
				return fmt.Sprintf("restore: %d %s", resp.StatusCode, b)
			}
			if err := wait(); err != nil {
				return fmt.Sprintf("restore %s, round %d: %v", body, rep, err)
			}
			best[i] = min(best[i], time.Since(t0).Seconds())
		}
	}
	verdict := "ok"
	if best[1] > 2*best[0] {
		verdict = "MISSED"
	}
	return fmt.Sprintf("restore: the checkpoint at 300 events, then %d rejected events to catch up on, through the service (best of five)\n"+
		"  from_checkpoint: %.3f s; skip over them: %.3f s; ratio %.2f (target: about 1): %s\n", n, best[0], best[1], best[1]/best[0], verdict)
}
