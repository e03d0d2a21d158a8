package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"net"
	"net/http"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"
	"github.com/twmb/franz-go/pkg/kfake"

	"tidemark/api"
	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/api/replay"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Crash loops: the real binary, killed with SIGKILL at random moments while
// it learns, restarted each time. At the end nothing acknowledged is lost,
// nothing is applied twice, and the state equals an uninterrupted run.

var crashSpecs = []string{"knn:k=5,window=100", "rls:forget=0.99", "sliding-rls:window=60", "mean:window=50"}

func buildBinary(t *testing.T) string {
	t.Helper()
	bin := filepath.Join(t.TempDir(), "tidemark")
	out, err := exec.Command("go", "build", "-o", bin, ".").CombinedOutput()
	if err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	return bin
}

// startBroker starts a Kafka-protocol broker in process (kfake) with a topic
// "events" of n partitions, closed when the test ends.
func startBroker(t *testing.T, n int) string {
	t.Helper()
	c, err := kfake.NewCluster(kfake.NumBrokers(1), kfake.SeedTopics(int32(n), "events"))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(c.Close)
	return c.ListenAddrs()[0]
}

func freePort(t *testing.T) string {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().String()
}

type proc struct {
	cmd  *exec.Cmd
	base string
	log  *bytes.Buffer
}

func startServe(t *testing.T, bin, dir, addr string, extra ...string) *proc {
	t.Helper()
	args := []string{"serve", "--data", dir, "--listen", addr, "--checkpoint-every", "40", "--min-scored", "-1", "--log-level", "warn"}
	for _, s := range crashSpecs {
		args = append(args, "--learner", s)
	}
	cmd := exec.Command(bin, append(args, extra...)...)
	var log bytes.Buffer
	cmd.Stdout, cmd.Stderr = &log, &log
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	p := &proc{cmd: cmd, base: "http://" + addr, log: &log}
	deadline := time.Now().Add(20 * time.Second)
	for {
		resp, err := http.Get(p.base + "/healthz")
		if err == nil {
			resp.Body.Close()
			return p
		}
		if time.Now().After(deadline) {
			cmd.Process.Kill()
			t.Fatalf("the service did not come up: %s", log.String())
		}
		time.Sleep(10 * time.Millisecond)
	}
}

func (p *proc) kill() { p.cmd.Process.Signal(syscall.SIGKILL); p.cmd.Wait() }
func (p *proc) term(t *testing.T) {
	p.cmd.Process.Signal(syscall.SIGTERM)
	if err := p.cmd.Wait(); err != nil {
		t.Fatalf("after SIGTERM: %v\n%s", err, p.log.String())
	}
}

func (p *proc) waitReady(t *testing.T) {
	t.Helper()
	// Long enough for a consumer group to forget members killed earlier
	// (session timeout 10 s, then a rebalance).
	deadline := time.Now().Add(60 * time.Second)
	for time.Now().Before(deadline) {
		resp, err := http.Get(p.base + "/readyz")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == 200 {
				return
			}
		}
		time.Sleep(10 * time.Millisecond)
	}
	t.Fatalf("not ready: %s", p.log.String())
}

// reportAt polls GET /v1/learners until the published snapshot has applied
// at least n events (readiness is the loop's; the snapshot follows within
// the publish interval).
func (p *proc) reportAt(t *testing.T, n int) learner.Report {
	t.Helper()
	deadline := time.Now().Add(60 * time.Second) // a consumer group may take a session timeout or two to settle
	for {
		var rep learner.Report
		resp, err := http.Get(p.base + "/v1/learners")
		if err == nil {
			json.NewDecoder(resp.Body).Decode(&rep)
			resp.Body.Close()
			if rep.Events >= int64(n) {
				// and still the same a publish interval later: caught up
				time.Sleep(3 * api.DefaultPublishEvery)
				var again learner.Report
				if resp, err := http.Get(p.base + "/v1/learners"); err == nil {
					json.NewDecoder(resp.Body).Decode(&again)
					resp.Body.Close()
					if again.Events == rep.Events {
						return again
					}
				}
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("the snapshot never reached %d events (at %d)", n, rep.Events)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

func crashEvent(i int) string {
	t := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC).Add(time.Duration(i) * time.Minute)
	rooms := []string{"room-a", "room-b", "room-c"}
	x := float64(i%97) / 10
	return fmt.Sprintf(`{"time":%q,"key":%q,"features":{"outdoor_c":%.1f,"door_min":%d},"target":%.2f}`,
		t.Format(time.RFC3339), rooms[i%3], x, i%5, 20+2*x+float64(i%7)/3)
}

func crashEngine(t *testing.T) learner.Config {
	var cfg learner.Config
	for _, s := range crashSpecs {
		sp, err := learner.ParseSpec(s)
		if err != nil {
			t.Fatal(err)
		}
		cfg.Learners = append(cfg.Learners, sp)
	}
	return cfg
}

// shutdownDigest returns the state_sha256 of the newest checkpoint.
func newestState(t *testing.T, dir string) checkpoint.Info {
	t.Helper()
	s, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: filepath.Join(dir, "checkpoints")})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	c, _, err := s.Latest()
	if err != nil {
		t.Fatal(err)
	}
	return c.Info
}

// newestPartitions loads the newest good checkpoint of every partition
// store under dir/checkpoints (a consumer group's layout) into one engine.
func newestPartitions(t *testing.T, dir string, cfg learner.Config) *learner.Engine {
	t.Helper()
	eng, err := learner.NewEngine(cfg)
	if err != nil {
		t.Fatal(err)
	}
	parts, _ := filepath.Glob(filepath.Join(dir, "checkpoints", "partition-*"))
	if len(parts) == 0 {
		t.Fatal("no partition checkpoints")
	}
	for _, d := range parts {
		s, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: d, ReadOnly: true})
		if err != nil {
			t.Fatal(err)
		}
		if _, err := persist.AdoptPartition(s, eng, ""); err != nil { // a partition without events has none
			t.Fatalf("%s: %v", d, err)
		}
		s.Close()
	}
	return eng
}

func TestCrashLoopHTTPIntake(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and kills it 20 times")
	}
	bin := buildBinary(t)
	dir, addr := t.TempDir(), freePort(t)
	rng := rand.New(rand.NewPCG(6, 6))
	acked := map[int]bool{} // event index → acknowledged
	next := 0
	const cycles, batch = 20, 25
	for c := 0; c < cycles; c++ {
		p := startServe(t, bin, dir, addr)
		var mu sync.Mutex
		stop := make(chan struct{})
		done := make(chan struct{})
		go func() {
			defer close(done)
			client := &http.Client{Timeout: 5 * time.Second}
			for {
				select {
				case <-stop:
					return
				default:
				}
				mu.Lock()
				first := next
				next += batch
				mu.Unlock()
				var lines []string
				for i := first; i < first+batch; i++ {
					lines = append(lines, crashEvent(i))
				}
				resp, err := client.Post(p.base+"/v1/events", "application/x-ndjson", strings.NewReader(strings.Join(lines, "\n")))
				if err != nil {
					return // killed mid-request: this batch is not acknowledged
				}
				resp.Body.Close()
				if resp.StatusCode == 200 {
					mu.Lock()
					for i := first; i < first+batch; i++ {
						acked[i] = true
					}
					mu.Unlock()
				}
			}
		}()
		time.Sleep(time.Duration(20+rng.IntN(250)) * time.Millisecond)
		p.kill()
		close(stop)
		<-done
	}
	// The last run: caught up, then a clean stop.
	p := startServe(t, bin, dir, addr)
	p.waitReady(t)
	rep := p.reportAt(t, len(acked))
	p.term(t)

	// Every acknowledged event is in the journal exactly once; the journal
	// holds nothing twice (events are told apart by their times).
	j, err := intake.OpenJournal(intake.JournalConfig{Dir: filepath.Join(dir, "journal")})
	if err != nil {
		t.Fatal(err)
	}
	var payloads [][]byte
	seen := map[int64]int{}
	r := j.Reader(1)
	var ev learner.Event
	for off := int64(1); off <= j.Durable(); off++ {
		_, pl, err := r.Next(context.Background())
		if err != nil {
			t.Fatal(err)
		}
		payloads = append(payloads, append([]byte(nil), pl...))
		learner.DecodeEvent(pl, &ev)
		seen[ev.Time]++
	}
	j.Close()
	lost, doubled := 0, 0
	for i := range acked {
		var e learner.Event
		learner.DecodeEvent([]byte(crashEvent(i)), &e)
		if seen[e.Time] == 0 {
			lost++
		}
	}
	for _, n := range seen {
		if n > 1 {
			doubled++
		}
	}
	if lost != 0 || doubled != 0 || len(acked) == 0 {
		t.Fatalf("%d acknowledged events lost, %d doubled (of %d acknowledged)", lost, doubled, len(acked))
	}
	// The state equals an uninterrupted run over the journal's events.
	eng, _ := learner.NewEngine(crashEngine(t))
	h := intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(payloads, []byte("\n")), '\n')))
	if err := replay.Replay(context.Background(), h, eng, replay.ReplayConfig{}); err != nil {
		t.Fatal(err)
	}
	d := eng.Digest()
	if got := newestState(t, dir); got.StateSHA256 != fmt.Sprintf("%x", d[:]) || got.Events != eng.Applied() {
		t.Errorf("after %d kills: state %s (%d events), uninterrupted run %x (%d events)", cycles, got.StateSHA256, got.Events, d, eng.Applied())
	}
	want := eng.Report(true)
	rep.Positions, want.Positions = nil, nil
	g, _ := json.Marshal(rep)
	w, _ := json.Marshal(want)
	if !bytes.Equal(g, w) {
		t.Errorf("metrics after the crash loop differ from an uninterrupted run")
	}
	t.Logf("%d SIGKILL cycles: %d events acknowledged, %d in the journal, 0 lost, 0 doubled", cycles, len(acked), len(payloads))
}

func TestCrashLoopKafkaIntake(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and kills it 20 times")
	}
	bin := buildBinary(t)
	broker := startBroker(t, 3)
	w := &kafka.Writer{Addr: kafka.TCP(broker), Topic: "events", Balancer: &kafka.Hash{}, BatchSize: 100, BatchTimeout: 2 * time.Millisecond}
	defer w.Close()
	dir, addr := t.TempDir(), freePort(t)
	rng := rand.New(rand.NewPCG(7, 7))
	produced := 0
	produce := func(n int) {
		var msgs []kafka.Message
		for i := produced; i < produced+n; i++ {
			e := crashEvent(i)
			var ev learner.Event
			learner.DecodeEvent([]byte(e), &ev)
			msgs = append(msgs, kafka.Message{Key: []byte(ev.Key), Value: []byte(e)})
		}
		if err := w.WriteMessages(context.Background(), msgs...); err != nil {
			t.Fatal(err)
		}
		produced += n
	}
	kafkaFlags := []string{"--kafka-brokers", broker, "--kafka-topic", "events", "--kafka-group", "crash"}
	const cycles = 20
	for cyc := 0; cyc < cycles; cyc++ {
		produce(150)
		p := startServe(t, bin, dir, addr, kafkaFlags...)
		time.Sleep(time.Duration(50+rng.IntN(400)) * time.Millisecond)
		p.kill()
	}
	p := startServe(t, bin, dir, addr, kafkaFlags...)
	p.waitReady(t)
	// Ready means caught up on the partitions this instance owns; members
	// killed above may hold some until the group forgets them (the
	// session timeout), so wait for every event.
	p.reportAt(t, produced)
	p.term(t)

	// Reference: every message, partition by partition (the state does not
	// depend on the interleaving), through one uninterrupted engine.
	k, _ := intake.NewKafka(intake.KafkaConfig{Brokers: []string{broker}, Topic: "events"})
	k.Refresh(context.Background())
	var lines [][]byte
	ref, _ := learner.NewEngine(crashEngine(t)) // the same events at their Kafka positions
	for _, hw := range k.HighWater() {
		r := kafka.NewReader(kafka.ReaderConfig{Brokers: []string{broker}, Topic: "events", Partition: int(hw.Partition), MaxWait: 50 * time.Millisecond})
		for {
			m, err := r.ReadMessage(context.Background())
			if err != nil {
				t.Fatal(err)
			}
			lines = append(lines, m.Value)
			var ev learner.Event
			if learner.DecodeEvent(m.Value, &ev) == nil {
				ref.Apply(learner.Position{Partition: hw.Partition, Offset: m.Offset}, &ev)
			}
			if m.Offset >= hw.Offset {
				break
			}
		}
		r.Close()
	}
	eng, _ := learner.NewEngine(crashEngine(t))
	h := intake.NewHistoryReader(bytes.NewReader(append(bytes.Join(lines, []byte("\n")), '\n')))
	replay.Replay(context.Background(), h, eng, replay.ReplayConfig{})
	// Each partition's newest checkpoint, put together, is the state of one
	// uninterrupted engine.
	got := newestPartitions(t, dir, crashEngine(t))
	if got.Applied() != int64(produced) {
		t.Errorf("the state applied %d events of the %d produced", got.Applied(), produced)
	}
	if gd, rd := got.Digest(), ref.Digest(); gd != rd {
		t.Errorf("after %d kills: state %x, an uninterrupted engine over the same messages %x", cycles, gd, rd)
	}
	var rep learner.Report
	// Restart to fetch the report of the final state.
	p = startServe(t, bin, dir, addr, kafkaFlags...)
	p.waitReady(t)
	rep = p.reportAt(t, produced)
	p.term(t)
	want := eng.Report(true)
	if rep.Duplicates != 0 || rep.Events != int64(produced) {
		t.Errorf("applied %d, duplicates %d; want %d and 0", rep.Events, rep.Duplicates, produced)
	}
	stripped := func(r learner.Report) []byte {
		r.Positions = nil
		for i := range r.Learners {
			if a := r.Learners[i].Drift.LastAlarm; a != nil {
				b := *a
				b.Position = learner.Position{}
				r.Learners[i].Drift.LastAlarm = &b
			}
		}
		b, _ := json.Marshal(r)
		return b
	}
	if !bytes.Equal(stripped(rep), stripped(want)) {
		t.Errorf("metrics after %d kills differ from an uninterrupted run over the same messages", cycles)
	}
	t.Logf("%d SIGKILL cycles over Kafka: %d messages, each applied once", cycles, produced)
}
