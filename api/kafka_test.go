package api

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"
	"github.com/twmb/franz-go/pkg/kfake"

	"tidemark/api/intake"
	"tidemark/api/replay"
	"tidemark/learner"
)

const topic = "events"

// broker starts a Kafka-protocol broker in process on loopback (kfake) with a
// three-partition topic.
func broker(t testing.TB) string { return brokerWith(t, 3) }

// brokerWith starts one with an n-partition topic.
func brokerWith(t testing.TB, n int) string {
	t.Helper()
	c, err := kfake.NewCluster(kfake.NumBrokers(1), kfake.SeedTopics(int32(n), topic))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(c.Close)
	return c.ListenAddrs()[0]
}

// roomBalancer puts room-a, room-b and room-c in partitions 0, 1 and 2, so
// that the three partitions all carry events (a hash of three keys may not).
type roomBalancer struct{}

func (roomBalancer) Balance(m kafka.Message, partitions ...int) int {
	if k := string(m.Key); strings.HasPrefix(k, "room-") && len(k) == 6 {
		return partitions[int(k[5]-'a')%len(partitions)]
	}
	return partitions[0]
}

// produce writes events keyed by their key, so that a key lives in one
// partition.
func produce(t testing.TB, addr string, lines [][]byte) {
	t.Helper()
	w := &kafka.Writer{Addr: kafka.TCP(addr), Topic: topic, Balancer: roomBalancer{}, RequiredAcks: kafka.RequireAll,
		BatchSize: 500, BatchTimeout: 10 * time.Millisecond}
	defer w.Close()
	var msgs []kafka.Message
	var ev learner.Event
	for _, l := range lines {
		learner.DecodeEvent(l, &ev)
		msgs = append(msgs, kafka.Message{Key: []byte(ev.Key), Value: l})
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := w.WriteMessages(ctx, msgs...); err != nil {
		t.Fatal(err)
	}
}

// lastOffsets reads the topic's last offset per non-empty partition.
func lastOffsets(t testing.TB, addr string) []learner.Position {
	t.Helper()
	k, err := intake.NewKafka(intake.KafkaConfig{Brokers: []string{addr}, Topic: topic})
	if err != nil {
		t.Fatal(err)
	}
	if err := k.Refresh(context.Background()); err != nil {
		t.Fatal(err)
	}
	return k.HighWater()
}

func (r *running) waitPositions(t testing.TB, want []learner.Position) learner.Report {
	t.Helper()
	deadline := time.Now().Add(60 * time.Second)
	for {
		rep := r.report(t)
		done := len(want) > 0
		for _, w := range want {
			i := slices.IndexFunc(rep.Positions, func(p learner.Position) bool { return p.Partition == w.Partition })
			done = done && i >= 0 && rep.Positions[i].Offset >= w.Offset
		}
		if done {
			return rep
		}
		if time.Now().After(deadline) {
			t.Fatalf("the service did not reach %v: at %v", want, rep.Positions)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

func kafkaConfig(t testing.TB, addr, dir string) Config {
	cfg := testConfig(t, dir)
	cfg.Kafka = &intake.KafkaConfig{Brokers: []string{addr}, Topic: topic, Group: "tidemark-test", MaxWait: 50 * time.Millisecond}
	return cfg
}

// partitionOrder reads the topic back partition by partition with a plain
// kafka-go reader: the events in an order `replay` can take, each key's
// events in their Kafka order.
func partitionOrder(t testing.TB, addr string, last []learner.Position) [][]byte {
	t.Helper()
	var out [][]byte
	for _, p := range last {
		r := kafka.NewReader(kafka.ReaderConfig{Brokers: []string{addr}, Topic: topic, Partition: int(p.Partition), MaxWait: 50 * time.Millisecond})
		ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
		for {
			m, err := r.ReadMessage(ctx)
			if err != nil {
				t.Fatal(err)
			}
			out = append(out, m.Value)
			if m.Offset >= p.Offset {
				break
			}
		}
		cancel()
		r.Close()
	}
	return out
}

// withoutPositions drops what legitimately differs between Kafka and a
// history file: the positions themselves.
func withoutPositions(r learner.Report) learner.Report {
	r.Positions = nil
	r.Learners = stripPositions(r.Learners)
	return r
}

func TestKafkaServiceAgreesWithReplay(t *testing.T) {
	addr := broker(t)
	lines := scenario(t, 2)
	produce(t, addr, lines[:1000])
	dir := t.TempDir()
	r := start(t, kafkaConfig(t, addr, dir))
	r.waitPositions(t, lastOffsets(t, addr))
	// A restart midway (SIGTERM's path: shutdown checkpoint) must not lose
	// or double anything.
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	produce(t, addr, lines[1000:])
	bad := kafka.Message{Key: []byte("room-a"), Value: []byte(`{"key":"room-a","features":{"outdoor_c":"warm"},"target":`)}
	w := &kafka.Writer{Addr: kafka.TCP(addr), Topic: topic, Balancer: roomBalancer{}}
	if err := w.WriteMessages(context.Background(), bad); err != nil {
		t.Fatal(err)
	}
	w.Close()
	r = start(t, kafkaConfig(t, addr, dir))
	last := lastOffsets(t, addr)
	if len(last) != 3 {
		t.Fatalf("events landed in %d partitions, want 3", len(last))
	}
	got := r.waitPositions(t, last)
	want := replayReport(t, engineConfig(t, serviceSpecs...), partitionOrder(t, addr, last))
	want.Rejected = 1 // the reference replays the same lines, the malformed one among them
	if got.Events != int64(len(lines)) || got.Duplicates != 0 || got.Rejected != 1 {
		t.Errorf("applied %d (duplicates %d, rejected %d), want %d, 0 and 1", got.Events, got.Duplicates, got.Rejected, len(lines))
	}
	// The malformed message is in the dead-letter file with its position
	// (partition 0, room-a's, at its last offset) and reason; it stopped nothing.
	r.stop()
	dead, _ := os.ReadFile(filepath.Join(dir, "deadletters.ndjson"))
	if !strings.Contains(string(dead), fmt.Sprintf(`"position":{"partition":0,"offset":%d}`, last[0].Offset)) || !strings.Contains(string(dead), "not valid JSON") {
		t.Errorf("dead letters: %s", dead)
	}
	r = start(t, kafkaConfig(t, addr, dir))
	r.waitPositions(t, last)
	sameJSON(t, "Kafka service and replay reports", withoutPositions(got), withoutPositions(want))

	row := `{"key":"room-c","time":"2026-03-02T23:00:00Z","features":{"outdoor_c":6.5,"door_min":0,"shift":"night"}}`
	refEng, _ := learner.NewEngine(engineConfig(t, serviceSpecs...))
	replay.Replay(context.Background(), intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(partitionOrder(t, addr, last), []byte("\n")), '\n'))), refEng, replay.ReplayConfig{})
	for _, name := range serviceSpecs {
		code, b := r.call(t, "POST", "/v1/predict", "", []byte(fmt.Sprintf(`{"learner":%q,"rows":[%s]}`, name, row)))
		var resp PredictResponse
		json.Unmarshal(b, &resp)
		var ev learner.Event
		learner.DecodeRow([]byte(row), &ev)
		p, _ := refEng.Predict("room-c", name, &ev)
		if code != 200 || resp.Predictions[0].Prediction != p.Value {
			t.Errorf("%s: service predicts %v (%d), replay %v", name, resp.Predictions, code, p.Value)
		}
	}
	// Offsets are committed once a checkpoint covers them (lag monitoring).
	code, _ := r.call(t, "POST", "/v1/checkpoints", "", nil)
	if code != 201 {
		t.Fatalf("checkpoint: %d", code)
	}
	client := &kafka.Client{Addr: kafka.TCP(addr)}
	fetched, err := client.OffsetFetch(context.Background(), &kafka.OffsetFetchRequest{GroupID: "tidemark-test", Topics: map[string][]int{topic: {0, 1, 2}}})
	if err != nil {
		t.Fatal(err)
	}
	for _, po := range fetched.Topics[topic] {
		want := last[po.Partition].Offset + 1
		if po.CommittedOffset != want {
			t.Errorf("partition %d: committed offset %d, want %d (the next after the checkpointed state)", po.Partition, po.CommittedOffset, want)
		}
	}
	if code, b := r.call(t, "POST", "/v1/events", "", []byte(lines[0])); code != 409 || !strings.Contains(string(b), "Kafka") {
		t.Errorf("POST /v1/events with Kafka intake: %d %s, want 409", code, b)
	}
}

// TestKcatInterop: events produced by Debian's kcat, an independent Kafka
// client (librdkafka), are consumed and learned. CI installs kcat and sets
// TIDEMARK_REQUIRE_KCAT=1; elsewhere the test is skipped when kcat is absent.
func TestKcatInterop(t *testing.T) {
	kcat, err := exec.LookPath("kcat")
	if err != nil {
		if os.Getenv("TIDEMARK_REQUIRE_KCAT") != "" {
			t.Fatal("kcat is required (apt-get install -y kcat)")
		}
		t.Skip("kcat not installed (apt-get install -y kcat); CI runs this test")
	}
	addr := broker(t)
	lines := scenario(t, 1)[:300]
	var input bytes.Buffer
	var ev learner.Event
	for _, l := range lines {
		learner.DecodeEvent(l, &ev)
		fmt.Fprintf(&input, "%s|%s\n", ev.Key, l)
	}
	path := filepath.Join(t.TempDir(), "in.txt")
	os.WriteFile(path, input.Bytes(), 0o600)
	cmd := exec.Command(kcat, "-P", "-b", addr, "-t", topic, "-K", "|", "-l", path)
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("kcat: %v\n%s", err, out)
	}
	r := start(t, kafkaConfig(t, addr, t.TempDir()))
	last := lastOffsets(t, addr)
	got := r.waitPositions(t, last)
	if got.Events != int64(len(lines)) || got.Rejected != 0 || got.Keys != 3 {
		t.Errorf("after kcat produced %d events: applied %d rejected %d keys %d", len(lines), got.Events, got.Rejected, got.Keys)
	}
	want := replayReport(t, engineConfig(t, serviceSpecs...), partitionOrder(t, addr, last))
	sameJSON(t, "kcat-fed service and replay", withoutPositions(got), withoutPositions(want))
}
