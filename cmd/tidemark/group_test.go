package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"slices"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"tidemark/api"
	"tidemark/api/intake"
	"tidemark/bench/synth"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// TestGroupSurvivesAKill: three `tidemark serve` processes in one consumer
// group share a six-partition topic and a checkpoint directory. One is
// killed with SIGKILL while events keep coming: the other two take its
// partitions from their last checkpoints and, once caught up, the group-wide
// report equals one engine that applied every message of the topic at its
// position (read back with a plain kafka-go reader) — nothing lost, nothing
// applied twice. The killed instance comes back and the view is still exact.
func TestGroupSurvivesAKill(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and runs three instances")
	}
	bin := buildBinary(t)
	broker := startBroker(t, 6)
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: 2, Seed: 4, Rooms: 12})
	lines := bytes.Split(bytes.TrimSpace(buf.Bytes()), []byte("\n"))
	w := &kafka.Writer{Addr: kafka.TCP(broker), Topic: "events", Balancer: kafka.Murmur2Balancer{Consistent: true}, BatchSize: 200, BatchTimeout: 2 * time.Millisecond}
	defer w.Close()
	produce := func(ls [][]byte) {
		var msgs []kafka.Message
		for _, l := range ls {
			var ev learner.Event
			learner.DecodeEvent(l, &ev)
			msgs = append(msgs, kafka.Message{Key: []byte(ev.Key), Value: l})
		}
		if err := w.WriteMessages(context.Background(), msgs...); err != nil {
			t.Fatal(err)
		}
	}
	shared := t.TempDir()
	flags := []string{"--kafka-brokers", broker, "--kafka-topic", "events", "--kafka-group", "three", "--checkpoint-dir", shared,
		"--hash-buckets", "4", "--time-features"}
	dirs := []string{t.TempDir(), t.TempDir(), t.TempDir()}
	addrs := []string{freePort(t), freePort(t), freePort(t)}
	var ps []*proc
	for i := range 3 {
		ps = append(ps, startServe(t, bin, dirs[i], addrs[i], flags...))
	}
	defer func() {
		for _, p := range ps {
			p.kill()
		}
	}()
	n := len(lines)
	produce(lines[:n/3])
	ref := func() learner.Report { return topicReport(t, broker) }
	sameJSON(t, "three instances", groupAt(t, ps[0], 3, broker), ref())

	produce(lines[n/3 : n/2])
	ps[2].kill()
	killed := time.Now()
	produce(lines[n/2:])
	got := groupAt(t, ps[1], 2, broker)
	t.Logf("SIGKILL of one of three instances: the other two caught up on its partitions %v later (the group's session timeout is 10 s)",
		time.Since(killed).Round(100*time.Millisecond))
	sameJSON(t, "two instances after a SIGKILL", got, ref())

	ps[2] = startServe(t, bin, dirs[2], addrs[2], flags...)
	for _, p := range ps {
		sameJSON(t, "three instances after the restart", groupAt(t, p, 3, broker), ref())
	}

	// `checkpoints list` on the shared directory lists every partition's.
	var out, errOut bytes.Buffer
	if err := runCheckpoints([]string{"list", shared, "--json"}, &out, &errOut); err != nil {
		t.Fatalf("checkpoints list: %v %s", err, errOut.String())
	}
	var list []checkpoint.Info
	json.Unmarshal(out.Bytes(), &list)
	parts, handover := map[int32]bool{}, false
	for _, in := range list {
		if in.Partition != nil {
			parts[*in.Partition] = true
		}
		handover = handover || in.Reason == checkpoint.Handover
	}
	if len(parts) != 6 || !handover {
		t.Errorf("checkpoints list of the group's directory: partitions %v, a handover among them %v", parts, handover)
	}
}

// groupAt polls p's group-wide report until n instances contribute and it
// covers every message of the topic.
func groupAt(t *testing.T, p *proc, n int, broker string) learner.Report {
	t.Helper()
	want := topicLast(t, broker)
	deadline := time.Now().Add(90 * time.Second) // a session timeout or two for the group to settle
	last := ""
	for time.Now().Before(deadline) {
		resp, err := http.Get(p.base + "/v1/learners?scope=group")
		if err == nil {
			var rep api.GroupReport
			if resp.StatusCode == 200 && json.NewDecoder(resp.Body).Decode(&rep) == nil {
				ok := len(rep.Contributors) == n
				for _, w := range want {
					i := slices.IndexFunc(rep.Positions, func(q learner.Position) bool { return q.Partition == w.Partition })
					ok = ok && i >= 0 && rep.Positions[i].Offset >= w.Offset
				}
				if ok {
					resp.Body.Close()
					return rep.Report
				}
				last = fmt.Sprintf("%d instances, at %v", len(rep.Contributors), rep.Positions)
			} else {
				last = fmt.Sprintf("status %d", resp.StatusCode)
			}
			resp.Body.Close()
		}
		time.Sleep(50 * time.Millisecond)
	}
	t.Fatalf("the group did not reach %v from %d instances: %s\n%s", want, n, last, p.log.String())
	return learner.Report{}
}

func topicLast(t *testing.T, broker string) []learner.Position {
	k, _ := intake.NewKafka(intake.KafkaConfig{Brokers: []string{broker}, Topic: "events"})
	if err := k.Refresh(context.Background()); err != nil {
		t.Fatal(err)
	}
	return k.HighWater()
}

// topicReport is the report of one engine that applied every message of the
// topic at its position.
func topicReport(t *testing.T, broker string) learner.Report {
	t.Helper()
	cfg := crashEngine(t)
	cfg.Features = learner.FeatureConfig{HashBuckets: 4, TimeFeatures: true}
	ref, err := learner.NewEngine(cfg)
	if err != nil {
		t.Fatal(err)
	}
	for _, hw := range topicLast(t, broker) {
		r := kafka.NewReader(kafka.ReaderConfig{Brokers: []string{broker}, Topic: "events", Partition: int(hw.Partition), MaxWait: 50 * time.Millisecond})
		for {
			m, err := r.ReadMessage(context.Background())
			if err != nil {
				t.Fatal(err)
			}
			pos := learner.Position{Partition: hw.Partition, Offset: m.Offset}
			var ev learner.Event
			if learner.DecodeEvent(m.Value, &ev) != nil {
				ref.Skip(pos)
			} else {
				ref.Apply(pos, &ev)
			}
			if m.Offset >= hw.Offset {
				break
			}
		}
		r.Close()
	}
	return ref.Report(true)
}

func sameJSON(t *testing.T, what string, got, want any) {
	t.Helper()
	g, _ := json.Marshal(got)
	w, _ := json.Marshal(want)
	if !bytes.Equal(g, w) {
		t.Errorf("%s: the group-wide report differs from one engine over the topic:\n got %.500s\nwant %.500s", what, g, w)
	}
}
