package main

import (
	"bytes"
	"fmt"
	"net/http"
	"slices"
	"sync"
	"time"

	"tidemark/api"
)

// answerCost times POST /v1/predict with the answer log (each answer
// registered and on stable storage before it is returned) against the same
// service without it (--answer-log=false), interleaved call by call: one
// client at a time (each call waits for its own fsync), then 8 at once
// (their fsyncs are shared: group commit).
func answerCost() string {
	svcs := make([]*api.Service, 2)
	for i, off := range []bool{false, true} {
		svc, stop := runService(api.Config{MinScored: -1, NoAnswerLog: off})
		defer stop()
		resp, err := http.Post("http://"+svc.Addr()+"/v1/events", "application/x-ndjson", bytes.NewReader(scenarioLines(2000)))
		if err != nil {
			panic(err)
		}
		resp.Body.Close()
		svcs[i] = svc
	}
	time.Sleep(500 * time.Millisecond) // the snapshots publish
	row := []byte(`{"key":"room-b","features":{"outdoor_c":14.2,"door_min":2,"shift":"day"}}`)
	client := &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: 16}}
	ask := func(svc *api.Service) time.Duration { return timedPredict(client, "http://"+svc.Addr(), row) }
	rounds := 2000
	if quick {
		rounds = 500
	}
	q := func(d []time.Duration, f float64) float64 {
		slices.Sort(d)
		return float64(d[int(f*float64(len(d)-1))].Microseconds())
	}
	var b bytes.Buffer
	fmt.Fprintln(&b, "served scoring: POST /v1/predict with the answer log against --answer-log=false, interleaved call by call")
	for _, clients := range []int{1, 8} {
		var mu sync.Mutex
		var on, off []time.Duration
		var wg sync.WaitGroup
		t0 := time.Now()
		for range clients {
			wg.Add(1)
			go func() {
				defer wg.Done()
				for range rounds / clients {
					a, c := ask(svcs[0]), ask(svcs[1])
					mu.Lock()
					on, off = append(on, a), append(off, c)
					mu.Unlock()
				}
			}()
		}
		wg.Wait()
		took := time.Since(t0)
		fmt.Fprintf(&b, "  %d client(s), %d calls each way: logged p50 %.0f µs p99 %.0f µs; not logged p50 %.0f µs p99 %.0f µs (%.1f× and %.1f×); %.0f calls/s both ways\n",
			clients, len(on), q(on, 0.5), q(on, 0.99), q(off, 0.5), q(off, 0.99), q(on, 0.5)/q(off, 0.5), q(on, 0.99)/q(off, 0.99), float64(2*len(on))/took.Seconds())
	}
	return b.String()
}
