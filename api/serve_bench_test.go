package api

import (
	"bytes"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"slices"
	"strings"
	"sync/atomic"
	"testing"
	"time"
)

// BenchmarkHTTPIntake: events per second through POST /v1/events with
// durable acknowledgement (each request's events fsynced before the answer),
// batches of 500, four concurrent clients.
func BenchmarkHTTPIntake(b *testing.B) {
	lines := scenario(b, 7)
	r := start(b, testConfig(b, b.TempDir()))
	var next atomic.Int64
	b.ReportAllocs()
	b.ResetTimer()
	t0 := time.Now()
	b.SetParallelism(2) // 2 × GOMAXPROCS clients
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			i := int(next.Add(500)) % (len(lines) - 500)
			body := bytes.Join(lines[i:i+500], []byte("\n"))
			resp, err := http.Post(r.base+"/v1/events", "application/x-ndjson", bytes.NewReader(body))
			if err != nil || resp.StatusCode != 200 {
				b.Errorf("post: %v %v", err, resp.Status)
				return
			}
			resp.Body.Close()
		}
	})
	b.ReportMetric(float64(b.N*500)/time.Since(t0).Seconds(), "events/s")
}

// BenchmarkPredictWhileLearning: POST /v1/predict latency while a writer
// feeds events as fast as the journal takes them. Reports p50 and p99.
func BenchmarkPredictWhileLearning(b *testing.B) {
	lines := scenario(b, 14)
	cfg := testConfig(b, b.TempDir())
	cfg.Engine = engineConfig(b, "knn:k=10,window=2000", "rls:forget=0.995", "sliding-rls:window=864", "mean:window=288")
	cfg.PublishEvery, cfg.CheckpointEvery = DefaultPublishEvery, DefaultCheckpointEvery
	r := start(b, cfg)
	// warm up: one day, so every learner on every key answers
	post := func(ls [][]byte) {
		resp, err := http.Post(r.base+"/v1/events", "application/x-ndjson", bytes.NewReader(bytes.Join(ls, []byte("\n"))))
		if err == nil {
			resp.Body.Close()
		}
	}
	post(lines[:900])
	time.Sleep(200 * time.Millisecond)
	stop := make(chan struct{})
	done := make(chan struct{})
	go func() {
		defer close(done)
		for i := 900; ; i += 250 {
			select {
			case <-stop:
				return
			default:
			}
			if i+250 > len(lines) {
				i = 900
			}
			post(lines[i : i+250])
		}
	}()
	row := []byte(`{"learner":"knn:k=10,window=2000","key":"room-b","time":"2026-03-05T12:00:00Z","features":{"outdoor_c":14.2,"door_min":2,"shift":"day"}}`)
	b.ReportAllocs()
	lat := timePredicts(b, r.base, row)
	close(stop)
	<-done
	reportLatency(b, lat)
	rep := r.report(b)
	b.ReportMetric(float64(rep.Events), "events_applied")
}

// BenchmarkKafkaIntake: events per second from a topic on an in-process
// broker through the Kafka intake and the engine (four learners).
func BenchmarkKafkaIntake(b *testing.B) {
	lines := scenario(b, 7)
	addr := brokerB(b)
	total := 0
	for total < max(b.N, 1) {
		produce(b, addr, lines)
		total += len(lines)
	}
	last := lastOffsets(b, addr)
	b.ResetTimer()
	t0 := time.Now()
	r := start(b, kafkaConfig(b, addr, b.TempDir()))
	r.waitPositions(b, last)
	el := time.Since(t0)
	b.ReportMetric(float64(total)/el.Seconds(), "events/s")
	b.ReportMetric(float64(total), "events")
}

// brokerB is broker for benchmarks.
func brokerB(b *testing.B) string { return broker(b) }

// BenchmarkPredictWhileLearningKeys: issue 13's service case — POST
// /v1/predict latency (p50, p99) from one client while a writer feeds events
// over 100 or 100 000 keys (rls d = 8 + mean:window=100) as fast as the
// journal takes them, the service publishing every 200 ms as it does by
// default. Every key has two events before the clock starts (the one asked
// about, 22).
func BenchmarkPredictWhileLearningKeys(b *testing.B) {
	for _, nk := range []int{100, 100_000} {
		b.Run(fmt.Sprintf("keys=%d", nk), func(b *testing.B) {
			cfg := testConfig(b, b.TempDir())
			cfg.Engine = engineConfig(b, "rls:forget=0.99", "mean:window=100")
			cfg.PublishEvery, cfg.CheckpointEvery = DefaultPublishEvery, 1<<40
			r := start(b, cfg)
			rng := rand.New(rand.NewPCG(13, uint64(nk)))
			line := func(i int, key int) []byte {
				var feats strings.Builder
				y := 0.0
				for j := 0; j < 8; j++ {
					v := rng.NormFloat64()
					y += float64(j+1) * v
					fmt.Fprintf(&feats, `%s"x%d":%.4f`, map[bool]string{true: "", false: ","}[j == 0], j, v)
				}
				return []byte(fmt.Sprintf(`{"time":"%s","key":"meter-%d","features":{%s},"target":%.4f}`,
					time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC).Add(time.Duration(i)*time.Second).Format(time.RFC3339), key, feats.String(), y))
			}
			post := func(ls [][]byte) {
				resp, err := http.Post(r.base+"/v1/events", "application/x-ndjson", bytes.NewReader(bytes.Join(ls, []byte("\n"))))
				if err == nil {
					resp.Body.Close()
				}
			}
			// Two events for every key first, so that every key answers.
			i := 0
			var batch [][]byte
			for rep := 0; rep < 2; rep++ {
				for k := 0; k < nk; k++ {
					batch = append(batch, line(i, k))
					i++
					if len(batch) == 1000 {
						post(batch)
						batch = batch[:0]
					}
				}
			}
			for k := 0; k < 20; k++ { // enough for rls to answer on the key asked
				batch = append(batch, line(i, 7))
				i++
			}
			post(batch)
			for r.report(b).Events < int64(2*nk+20) {
				time.Sleep(20 * time.Millisecond)
			}
			var pool [][]byte // the writer's events: keys drawn at random
			for len(pool) < 20_000 {
				pool = append(pool, line(i, rng.IntN(nk)))
				i++
			}
			stop := make(chan struct{})
			done := make(chan struct{})
			go func() {
				defer close(done)
				for j := 0; ; j = (j + 500) % len(pool) {
					select {
					case <-stop:
						return
					default:
					}
					post(pool[j : j+500])
				}
			}()
			row := []byte(`{"learner":"rls:forget=0.99","key":"meter-7","time":"2026-03-05T12:00:00Z","features":{"x0":0.1,"x1":0.2,"x2":0.3,"x3":0.4,"x4":0.5,"x5":0.6,"x6":0.7,"x7":0.8}}`)
			lat := timePredicts(b, r.base, row)
			close(stop)
			<-done
			reportLatency(b, lat)
		})
	}
}

// timePredicts posts row to /v1/predict b.N times, on the benchmark's clock,
// and returns each answer's latency.
func timePredicts(b *testing.B, base string, row []byte) []time.Duration {
	lat := make([]time.Duration, 0, b.N)
	client := &http.Client{}
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		t0 := time.Now()
		resp, err := client.Post(base+"/v1/predict", "application/json", bytes.NewReader(row))
		if err != nil {
			b.Fatal(err)
		}
		if resp.StatusCode != 200 {
			b.Fatalf("predict: %s", resp.Status)
		}
		io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		lat = append(lat, time.Since(t0))
	}
	b.StopTimer()
	return lat
}

// reportLatency reports the median and 99th percentile of lat.
func reportLatency(b *testing.B, lat []time.Duration) {
	slices.Sort(lat)
	b.ReportMetric(float64(lat[len(lat)/2].Microseconds()), "p50_µs")
	b.ReportMetric(float64(lat[len(lat)*99/100].Microseconds()), "p99_µs")
}
