package api

import (
	"bytes"
	"net/http"
	"slices"
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
	lat := make([]time.Duration, 0, b.N)
	client := &http.Client{}
	b.ReportAllocs()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		t0 := time.Now()
		resp, err := client.Post(r.base+"/v1/predict", "application/json", bytes.NewReader(row))
		if err != nil {
			b.Fatal(err)
		}
		if resp.StatusCode != 200 {
			b.Fatalf("predict: %s", resp.Status)
		}
		var buf [4096]byte
		for {
			if _, err := resp.Body.Read(buf[:]); err != nil {
				break
			}
		}
		resp.Body.Close()
		lat = append(lat, time.Since(t0))
	}
	b.StopTimer()
	close(stop)
	<-done
	slices.Sort(lat)
	b.ReportMetric(float64(lat[len(lat)/2].Microseconds()), "p50_µs")
	b.ReportMetric(float64(lat[len(lat)*99/100].Microseconds()), "p99_µs")
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
