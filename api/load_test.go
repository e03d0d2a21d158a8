package api

import (
	"bytes"
	"encoding/json"
	"fmt"
	"net/http"
	"os"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"tidemark/learner"
)

// loadEvent is the i-th event of an endless stream (times five minutes
// apart per room), so that a long load needs no stored history.
func loadEvent(i int) []byte {
	at := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC).Add(time.Duration(i/3) * 5 * time.Minute)
	x := float64((i*7919)%200) / 10
	door := (i * 31) % 6
	return []byte(fmt.Sprintf(`{"time":%q,"key":"room-%c","features":{"outdoor_c":%.1f,"door_min":%d,"shift":"day"},"target":%.2f}`,
		at.Format(time.RFC3339), 'a'+byte(i%3), x, door, 15+0.5*x+1.5*float64(door)+float64(i%11)/5))
}

// TestLoad: eight predict clients for TIDEMARK_LOAD_SECONDS (default 5; CI
// runs 60) while a writer feeds events as fast as the service takes them.
// No request fails; every sampled prediction equals what an engine that
// applied exactly the events the answer says it had would predict (a
// consistent state); memory stays flat once the windows are full.
func TestLoad(t *testing.T) {
	secs := 5
	if s, err := strconv.Atoi(os.Getenv("TIDEMARK_LOAD_SECONDS")); err == nil && s > 0 {
		secs = s
	}
	if testing.Short() {
		secs = 2
	}
	cfg := testConfig(t, t.TempDir())
	cfg.PublishEvery, cfg.CheckpointEvery = DefaultPublishEvery, 20_000
	cfg.Engine = engineConfig(t, "knn:k=10,window=500", "rls:forget=0.995", "sliding-rls:window=300", "mean:window=288")
	r := start(t, cfg)
	var written atomic.Int64
	stop := make(chan struct{})
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { // the writer
		defer wg.Done()
		client := &http.Client{Timeout: 30 * time.Second}
		for n := 0; ; n += 200 {
			select {
			case <-stop:
				return
			default:
			}
			var b bytes.Buffer
			for i := n; i < n+200; i++ {
				b.Write(loadEvent(i))
				b.WriteByte('\n')
			}
			resp, err := client.Post(r.base+"/v1/events", "application/x-ndjson", &b)
			if err != nil || resp.StatusCode != 200 {
				t.Errorf("writer: %v %v", err, resp)
				return
			}
			resp.Body.Close()
			written.Store(int64(n + 200))
		}
	}()
	for r.report(t).Events < 3000 { // windows fill
		time.Sleep(20 * time.Millisecond)
	}
	// The live heap once the windows are full: after a forced collection,
	// so that it does not depend on when the collector last ran (a loaded
	// machine runs it later and the heap in use looks larger).
	liveHeap := func() uint64 {
		runtime.GC()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		return ms.HeapAlloc
	}
	// One checkpoint first: its compressor keeps a history window (16 MiB)
	// from the first checkpoint on, once for the life of the service.
	if code, b := r.call(t, "POST", "/v1/checkpoints", "", nil); code != 201 {
		t.Fatalf("checkpoint: %d %s", code, b)
	}
	baseline := liveHeap()
	type sample struct {
		events  int64
		key     string
		learner string
		pred    float64
	}
	var (
		mu       sync.Mutex
		samples  []sample
		lat      []time.Duration
		requests atomic.Int64
		failures atomic.Int64
	)
	rows := []string{"room-a", "room-b", "room-c"}
	deadline := time.Now().Add(time.Duration(secs) * time.Second)
	for c := 0; c < 8; c++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			client := &http.Client{}
			for i := 0; time.Now().Before(deadline); i++ {
				key := rows[(c+i)%3]
				name := cfg.Engine.Learners[(c+i)%4].Name
				body := fmt.Sprintf(`{"learner":%q,"key":%q,"time":"2026-03-02T12:00:00Z","features":{"outdoor_c":9.5,"door_min":2,"shift":"day"}}`, name, key)
				t0 := time.Now()
				resp, err := client.Post(r.base+"/v1/predict", "application/json", strings.NewReader(body))
				d := time.Since(t0)
				requests.Add(1)
				if err != nil || resp.StatusCode != 200 {
					failures.Add(1)
					if resp != nil {
						resp.Body.Close()
					}
					continue
				}
				var pr PredictResponse
				json.NewDecoder(resp.Body).Decode(&pr)
				resp.Body.Close()
				mu.Lock()
				lat = append(lat, d)
				if i%(secs*40+1) == 0 && len(samples) < 40 {
					samples = append(samples, sample{pr.Events, key, name, pr.Prediction})
				}
				mu.Unlock()
			}
		}()
	}
	// Memory: the heap in use, every 500 ms, in the second half against the first.
	var heaps []uint64
	var peak uint64
	for time.Now().Before(deadline) {
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		heaps = append(heaps, ms.HeapInuse)
		peak = max(peak, ms.HeapInuse)
		time.Sleep(500 * time.Millisecond)
	}
	close(stop)
	wg.Wait()
	if failures.Load() != 0 {
		t.Errorf("%d of %d predict requests failed", failures.Load(), requests.Load())
	}
	slices.Sort(lat)
	p99 := lat[len(lat)*99/100]
	// Memory stays flat: the live heap at the end, clients stopped, against
	// the live heap once the windows were full. What the heap holds then is
	// bounded: the engine (its windows full), one or two published
	// snapshots (each a copy of the engine; a predict in flight may hold
	// the previous one), the checkpoint compressor's window, the curves (at most CurvePoints points a learner:
	// 2 000 × 4 × ~200 bytes ≈ 1.6 MB) and buffers. Our own bound, from that
	// list: 1.5× the baseline (a second snapshot) plus 8 MiB (curves and
	// buffers). A leak of 100 bytes an event passes it within the CI run's
	// 60 s (millions of events).
	final := liveHeap()
	if bound := baseline*3/2 + 8<<20; final > bound {
		t.Errorf("live heap grew from %d bytes once the windows were full to %d at the end (bound %d)", baseline, final, bound)
	}
	// Consistency: replay exactly the events each sampled answer covered.
	slices.SortFunc(samples, func(a, b sample) int { return int(a.events - b.events) })
	eng, _ := learner.NewEngine(cfg.Engine)
	applied := 0
	for _, s := range samples {
		for ; applied < int(s.events); applied++ {
			var ev learner.Event
			learner.DecodeEvent(loadEvent(applied), &ev)
			eng.Apply(learner.Position{Partition: 0, Offset: int64(applied + 1)}, &ev) // journal offsets start at 1
		}
		var q learner.Event
		learner.DecodeRow([]byte(fmt.Sprintf(`{"key":%q,"time":"2026-03-02T12:00:00Z","features":{"outdoor_c":9.5,"door_min":2,"shift":"day"}}`, s.key)), &q)
		p, err := eng.Predict(s.key, s.learner, &q)
		if err != nil || p.Value != s.pred {
			t.Errorf("answer at %d events: %v; an engine after exactly %d events: %v (%v)", s.events, s.pred, s.events, p.Value, err)
		}
	}
	t.Logf("%d s: %d predict requests, %d failed, p50 %v, p99 %v, %d events learned meanwhile, peak heap in use %.1f MiB, live heap %.1f → %.1f MiB, %d states checked",
		secs, requests.Load(), failures.Load(), lat[len(lat)/2], p99, written.Load(), float64(peak)/(1<<20),
		float64(baseline)/(1<<20), float64(final)/(1<<20), len(samples))
}
