package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"runtime"
	"slices"
	"strings"
	"syscall"
	"time"

	"github.com/segmentio/kafka-go"
	"github.com/twmb/franz-go/pkg/kfake"

	"tidemark/api"
	"tidemark/api/intake"
	"tidemark/bench/synth"
	"tidemark/learner"
)

// groupScale is issue 14's measure: events per second through one, two and
// three instances of one consumer group (in this process, on an in-process
// broker, a six-partition topic of the demo scenario over 60 rooms), with
// the process's CPU time per event, against plain kafka-go partition
// readers draining the same topic; then predict latency answered by the
// key's owner against forwarded by another instance, call by call.
func groupScale() string {
	days := 58 // 60 rooms × 288 readings a day: 10⁶ events
	if quick {
		days = 17
	}
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: days, Seed: 5, Rooms: 60})
	lines := bytes.Split(bytes.TrimSpace(buf.Bytes()), []byte("\n"))
	addr, last, closeBroker := topicOf(6, lines, true)
	defer closeBroker()
	total := int64(len(lines))

	var b strings.Builder
	fmt.Fprintf(&b, "consumer group: %d events over 6 partitions (60 keys, one rls learner), in-process broker, %d cores\n", total, runtime.NumCPU())
	// The floor is taken again before each group, so that each ratio sets
	// a group against draining measured moments before it.
	drain := func() (rate, cpu float64) {
		c0 := cpuTime()
		got, firstAt, err := intake.Drain(context.Background(), []string{addr}, "events", last)
		if err != nil {
			panic(err)
		}
		return float64(got-1) / time.Since(firstAt).Seconds(), (cpuTime() - c0).Seconds() * 1e6 / float64(got)
	}
	for n := 1; n <= 3; n++ {
		floorRate, floorCPU := drain()
		fmt.Fprintf(&b, "  floor, plain kafka-go readers draining the topic: %.0f events/s, %.2f CPU µs/event\n", floorRate, floorCPU)
		shared, _ := os.MkdirTemp("", "tidemark-bench-group-")
		cpu0 := cpuTime()
		t0 := time.Now()
		var svcs []*api.Service
		var stops []func()
		for range n {
			svc, stop := runService(api.Config{CheckpointEvery: 1 << 40, CheckpointDir: shared,
				Kafka: &intake.KafkaConfig{Brokers: []string{addr}, Topic: "events", Group: fmt.Sprintf("bench-%d", n)}})
			svcs, stops = append(svcs, svc), append(stops, stop)
		}
		// Joining and the rebalances it brings are a one-off cost: the rate
		// that matters, catching up on a backlog, is timed from the moment
		// the group has settled (every instance owns partitions, none move).
		var settled time.Time
		var atSettle int64
		for !groupCovers(svcs, last) {
			if settled.IsZero() && groupSettled(svcs) {
				settled = time.Now()
				for _, s := range svcs {
					a, _ := s.Progress(nil)
					atSettle += a
				}
			}
			time.Sleep(2 * time.Millisecond)
		}
		end := time.Now()
		cpu := (cpuTime() - cpu0).Seconds() * 1e6 / float64(total)
		steady := "drained before the group settled"
		if !settled.IsZero() {
			r := float64(total-atSettle) / end.Sub(settled).Seconds()
			steady = fmt.Sprintf("%12.0f events/s after it settled (%.2f s after start, %d%% of the backlog left; %.2f× the floor's time)",
				r, settled.Sub(t0).Seconds(), 100*(total-atSettle)/total, floorRate/r)
		}
		fmt.Fprintf(&b, "  %d instance(s): %12.0f events/s from start, %.2f CPU µs/event; %s\n", n, float64(total)/end.Sub(t0).Seconds(), cpu, steady)
		if n == 2 {
			fmt.Fprint(&b, forwardLatency(svcs))
		}
		for _, stop := range stops {
			stop()
		}
		os.RemoveAll(shared)
	}
	return b.String()
}

// groupSettled reports whether every instance owns partitions, none are
// moving, and together they own all six.
func groupSettled(svcs []*api.Service) bool {
	owned := map[int32]bool{}
	for _, s := range svcs {
		resp, err := http.Get("http://" + s.Addr() + "/v1/cluster?scope=instance")
		if err != nil {
			return false
		}
		var v api.InstanceView
		json.NewDecoder(resp.Body).Decode(&v)
		resp.Body.Close()
		if len(v.Partitions) == 0 || len(v.Moving) > 0 {
			return false
		}
		for _, p := range v.Partitions {
			owned[p.Partition] = true
		}
	}
	return len(owned) == 6
}

// topicOf starts an in-process broker (kfake) whose topic "events" has
// the given partitions and holds lines, keyed by their events' keys (the Java
// client's partitioner) when keyed is set, else spread round-robin; it
// returns the broker's address, each partition's last offset, and what
// stops the broker.
func topicOf(partitions int32, lines [][]byte, keyed bool) (string, []learner.Position, func()) {
	c, err := kfake.NewCluster(kfake.NumBrokers(1), kfake.SeedTopics(partitions, "events"))
	if err != nil {
		panic(err)
	}
	addr := c.ListenAddrs()[0]
	w := &kafka.Writer{Addr: kafka.TCP(addr), Topic: "events", Balancer: &kafka.RoundRobin{}, BatchSize: 1000, BatchTimeout: 5 * time.Millisecond}
	if keyed {
		w.Balancer = kafka.Murmur2Balancer{Consistent: true}
	}
	var msgs []kafka.Message
	var ev learner.Event
	for _, l := range lines {
		m := kafka.Message{Value: l}
		if keyed {
			ev.Key = ""
			learner.DecodeEvent(l, &ev)
			m.Key = []byte(ev.Key)
		}
		msgs = append(msgs, m)
	}
	if err := w.WriteMessages(context.Background(), msgs...); err != nil {
		panic(err)
	}
	w.Close()
	k, _ := intake.NewKafka(intake.KafkaConfig{Brokers: []string{addr}, Topic: "events"})
	k.Refresh(context.Background())
	return addr, k.HighWater(), c.Close
}

// groupCovers reports whether every position of want is covered by one of
// the instances.
func groupCovers(svcs []*api.Service, want []learner.Position) bool {
	for _, p := range want {
		covered := false
		for _, s := range svcs {
			_, ok := s.Progress([]learner.Position{p})
			covered = covered || ok
		}
		if !covered {
			return false
		}
	}
	return true
}

// forwardLatency times predicts for one key asked of its owner and of the
// other instance (which forwards), interleaved call by call.
func forwardLatency(svcs []*api.Service) string {
	var owner, other string
	for other == "" || owner == "" {
		owner, other = "", ""
		for _, s := range svcs {
			resp, err := http.Get("http://" + s.Addr() + "/v1/cluster?scope=instance")
			if err != nil {
				panic(err)
			}
			var v api.InstanceView
			json.NewDecoder(resp.Body).Decode(&v)
			resp.Body.Close()
			if slices.ContainsFunc(v.Partitions, func(p api.PartitionView) bool { return p.Partition == ownerPartition }) {
				owner = "http://" + s.Addr()
			} else {
				other = "http://" + s.Addr()
			}
		}
		time.Sleep(10 * time.Millisecond)
	}
	row := []byte(`{"key":"` + ownerKey + `","time":"2026-03-05T12:00:00Z","features":{"outdoor_c":14.2,"door_min":2,"shift":"day"}}`)
	client := &http.Client{}
	ask := func(base string) time.Duration { return timedPredict(client, base, row) }
	rounds := 4000
	if quick {
		rounds = 1000
	}
	var local, fwd []time.Duration
	for range rounds {
		local = append(local, ask(owner))
		fwd = append(fwd, ask(other))
	}
	slices.Sort(local)
	slices.Sort(fwd)
	q := func(d []time.Duration, f float64) float64 { return float64(d[int(f*float64(len(d)-1))].Microseconds()) }
	return fmt.Sprintf("  predict, two instances, %d calls each, interleaved: answered by the owner p50 %.0f µs p99 %.0f µs; forwarded p50 %.0f µs p99 %.0f µs (%.2f× and %.2f×)\n",
		rounds, q(local, 0.5), q(local, 0.99), q(fwd, 0.5), q(fwd, 0.99), q(fwd, 0.5)/q(local, 0.5), q(fwd, 0.99)/q(local, 0.99))
}

// ownerKey is a key of the scenario and ownerPartition its partition under
// the Java client's partitioner (murmur2) over six partitions.
var ownerKey = "room-b"
var ownerPartition = intake.Partitioners["murmur2"](ownerKey, 6)

// cpuTime is the process's user and system CPU time so far.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	syscall.Getrusage(syscall.RUSAGE_SELF, &ru)
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// timedPredict times one POST /v1/predict of row to the service at base
// (scheme and host), which must answer 200.
func timedPredict(client *http.Client, base string, row []byte) time.Duration {
	t0 := time.Now()
	resp, err := client.Post(base+"/v1/predict", "application/json", bytes.NewReader(row))
	if err != nil {
		panic(err)
	}
	io.Copy(io.Discard, resp.Body)
	resp.Body.Close()
	if resp.StatusCode != 200 {
		panic(fmt.Sprintf("predict: %s", resp.Status))
	}
	return time.Since(t0)
}
