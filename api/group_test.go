package api

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"tidemark/api/persist"
	"tidemark/bench/synth"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// The instances of one consumer group, in process, on an in-process broker
// (kfake) with a six-partition topic. The reference throughout is one
// engine that applies every message of the topic at its position, read back
// with a plain kafka-go reader: what one instance reading the whole topic
// holds (the state does not depend on how partitions interleave; see
// learner's TestMergedEnginesAreOneEngine).

const groupParts = 6

// groupBroker starts a broker with a six-partition topic.
func groupBroker(t testing.TB) string { return brokerWith(t, groupParts) }

// roomsScenario is the demo scenario over twelve rooms, so that every one
// of six partitions carries keys.
func roomsScenario(t testing.TB, days int) [][]byte {
	t.Helper()
	var buf bytes.Buffer
	synth.Write(&buf, synth.Config{Days: days, Seed: 9, Rooms: 12})
	return bytes.Split(bytes.TrimSpace(buf.Bytes()), []byte("\n"))
}

// produceKeyed writes events keyed by their key with the Java client's
// partitioner (murmur2, kafka-go's implementation), the service's default.
func produceKeyed(t testing.TB, addr string, lines [][]byte) {
	t.Helper()
	w := &kafka.Writer{Addr: kafka.TCP(addr), Topic: topic, Balancer: kafka.Murmur2Balancer{Consistent: true}, RequiredAcks: kafka.RequireAll,
		BatchSize: 500, BatchTimeout: 5 * time.Millisecond}
	defer w.Close()
	var msgs []kafka.Message
	for _, l := range lines {
		var ev learner.Event
		learner.DecodeEvent(l, &ev) // a malformed line keeps the empty key
		msgs = append(msgs, kafka.Message{Key: []byte(ev.Key), Value: l})
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := w.WriteMessages(ctx, msgs...); err != nil {
		t.Fatal(err)
	}
}

// topicEngine applies every message of the topic, partition by partition,
// to one engine.
func topicEngine(t testing.TB, addr string, cfg learner.Config) *learner.Engine {
	return topicEngineWith(t, addr, cfg, lastOffsets(t, addr), nil)
}

// topicEngineWith applies the messages of the topic up to the offsets of
// last to one engine, passing over (Engine.Pass) those pass says to.
func topicEngineWith(t testing.TB, addr string, cfg learner.Config, last []learner.Position, pass func(learner.Position, *learner.Event) bool) *learner.Engine {
	t.Helper()
	eng, err := learner.NewEngine(cfg)
	if err != nil {
		t.Fatal(err)
	}
	for _, hw := range last {
		r := kafka.NewReader(kafka.ReaderConfig{Brokers: []string{addr}, Topic: topic, Partition: int(hw.Partition), MaxWait: 50 * time.Millisecond})
		ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
		for {
			m, err := r.ReadMessage(ctx)
			if err != nil {
				t.Fatal(err)
			}
			pos := learner.Position{Partition: hw.Partition, Offset: m.Offset}
			var ev learner.Event
			switch err := learner.DecodeEvent(m.Value, &ev); {
			case err != nil:
				eng.Skip(pos)
			case pass != nil && pass(pos, &ev):
				eng.Pass(pos)
			default:
				eng.Apply(pos, &ev)
			}
			if m.Offset >= hw.Offset {
				break
			}
		}
		cancel()
		r.Close()
	}
	return eng
}

func groupConfig(t testing.TB, addr, ckDir string) Config {
	cfg := kafkaConfig(t, addr, t.TempDir())
	cfg.Kafka.Group = "tidemark-group"
	cfg.CheckpointDir = ckDir
	cfg.ForwardTimeout = 5 * time.Second
	return cfg
}

// waitGroup asks r for the group-wide report until it has contributions
// from n instances and covers want (the topic's last offsets).
func (r *running) waitGroup(t testing.TB, n int, want []learner.Position) GroupReport {
	t.Helper()
	deadline := time.Now().Add(90 * time.Second)
	var last string
	for {
		code, b := r.call(t, "GET", "/v1/learners?scope=group", "", nil)
		if code == 200 {
			var rep GroupReport
			if err := json.Unmarshal(b, &rep); err != nil {
				t.Fatal(err)
			}
			if covers(rep.Positions, want) && len(rep.Contributors) == n {
				return rep
			}
			last = fmt.Sprintf("at %v from %d instances", rep.Positions, len(rep.Contributors))
		} else {
			last = fmt.Sprintf("%d %s", code, b)
		}
		if time.Now().After(deadline) {
			t.Fatalf("the group did not reach %v: %s", want, last)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

func covers(have, want []learner.Position) bool {
	for _, w := range want {
		i := slices.IndexFunc(have, func(p learner.Position) bool { return p.Partition == w.Partition })
		if i < 0 || have[i].Offset < w.Offset {
			return false
		}
	}
	return true
}

// sameAsTopic checks a group-wide report against the reference engine, bit
// for bit: counters, positions, pooled errors, drift, per-key figures.
func sameAsTopic(t testing.TB, what string, got GroupReport, ref *learner.Engine) {
	t.Helper()
	got.Report.Served = nil // the answers served (checkPredicts) are not in the topic; servedAnswers counts them
	sameJSON(t, what, got.Report, ref.Report(true))
}

// waitServed waits until r's group-wide report counts want answers served
// (all learners): the answers of every instance, including those an instance
// that stopped handed over with its partitions.
func (r *running) waitServed(t testing.TB, want int64) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	var got int64
	for {
		code, b := r.call(t, "GET", "/v1/learners?scope=group", "", nil)
		var rep GroupReport
		if code == 200 && json.Unmarshal(b, &rep) == nil && rep.Served != nil {
			got = 0
			for _, m := range rep.Served.Learners {
				got += m.Answers
			}
			if got == want && rep.Served.Pending+rep.Served.Expired == want { // no label came: each waits or expired
				return
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("the group counts %d answers served, want %d", got, want)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// TestGroupOfThreeIsOneInstance: three instances in one group split six
// partitions; the group-wide report equals one engine over the whole topic
// to the bit, from every instance; every key is predicted by every instance
// exactly as its owner predicts it; an instance that stops hands its
// partitions over and one that comes back takes some again, and the view
// stays exact.
func TestGroupOfThreeIsOneInstance(t *testing.T) {
	addr := groupBroker(t)
	lines := roomsScenario(t, 2)
	half := len(lines) / 2
	produceKeyed(t, addr, lines[:half])
	ck := t.TempDir()
	var rs []*running
	for range 3 {
		rs = append(rs, start(t, groupConfig(t, addr, ck)))
	}
	last := lastOffsets(t, addr)
	if len(last) != groupParts {
		t.Fatalf("events landed in %d partitions, want %d", len(last), groupParts)
	}
	for _, r := range rs {
		sameAsTopic(t, "group-wide report (three instances)", r.waitGroup(t, 3, last), topicEngine(t, addr, testConfig(t, "").Engine))
	}
	// Each instance owns two partitions; /v1/cluster says so from anywhere.
	var cv ClusterView
	code, b := rs[1].call(t, "GET", "/v1/cluster", "", nil)
	if code != 200 || json.Unmarshal(b, &cv) != nil {
		t.Fatalf("GET /v1/cluster: %d %s", code, b)
	}
	owners := map[int32]string{}
	for _, in := range cv.Instances {
		if len(in.Partitions) != 2 || in.Error != "" {
			t.Errorf("instance %s: partitions %v (error %q), want two", in.Instance, in.Partitions, in.Error)
		}
		for _, p := range in.Partitions {
			owners[p.Partition] = in.Address
			if p.Lag != 0 || p.Offset != last[p.Partition].Offset {
				t.Errorf("partition %d: offset %d lag %d, want %d and 0", p.Partition, p.Offset, p.Lag, last[p.Partition].Offset)
			}
		}
	}
	if len(cv.Instances) != 3 || len(owners) != groupParts || len(cv.Unowned) != 0 || cv.Partitions != groupParts {
		t.Errorf("cluster: %d instances, %d partitions owned, unowned %v: %s", len(cv.Instances), len(owners), cv.Unowned, b)
	}
	// Per partition, exactly one instance says it owns it in /metrics.
	owned := map[string]int{}
	for _, r := range rs {
		code, b := r.call(t, "GET", "/metrics", "", nil)
		if code != 200 {
			t.Fatalf("metrics: %d", code)
		}
		for _, line := range strings.Split(string(b), "\n") {
			if p, ok := strings.CutPrefix(line, "tidemark_partition_owned{partition=\""); ok {
				part, val, _ := strings.Cut(p, "\"} ")
				if val == "1" {
					owned[part]++
				}
			}
		}
	}
	if len(owned) != groupParts {
		t.Errorf("tidemark_partition_owned: %v, want each of %d partitions owned once", owned, groupParts)
	}
	for p, n := range owned {
		if n != 1 {
			t.Errorf("partition %s owned by %d instances", p, n)
		}
	}
	checkPredicts(t, rs, addr)

	// One instance stops (its partitions are checkpointed and handed over);
	// more events arrive; the other two take them all.
	if err := rs[2].stop(); err != nil {
		t.Fatal(err)
	}
	produceKeyed(t, addr, lines[half:])
	last = lastOffsets(t, addr)
	ref := topicEngine(t, addr, testConfig(t, "").Engine)
	sameAsTopic(t, "group-wide report (two instances)", rs[0].waitGroup(t, 2, last), ref)
	// It comes back with its data directory: the view is still exact.
	rs[2] = start(t, groupConfig(t, addr, ck))
	for _, r := range rs {
		sameAsTopic(t, "group-wide report (after a restart)", r.waitGroup(t, 3, last), ref)
	}
	checkPredicts(t, rs, addr)
	// Each checkPredicts served each learner from each instance 12 rows
	// alone and 12 together; twice: none was lost or counted twice when the
	// third instance stopped and came back.
	for _, r := range rs {
		r.waitServed(t, int64(2*len(serviceSpecs)*len(rs)*24))
	}
}

// checkPredicts asks every instance for every key's prediction, one row at a
// time and all rows at once: every answer equals the reference engine's,
// and a single row's answer is the owner's, byte for byte.
// withoutAnswerID returns a predict answer without its answer_id.
func withoutAnswerID(t testing.TB, b []byte) []byte {
	var m map[string]json.RawMessage
	if err := json.Unmarshal(b, &m); err != nil {
		t.Fatalf("%v: %s", err, b)
	}
	if _, ok := m["answer_id"]; !ok {
		t.Fatalf("no answer_id in %s", b)
	}
	delete(m, "answer_id")
	out, _ := json.Marshal(m)
	return out
}

func checkPredicts(t *testing.T, rs []*running, addr string) {
	t.Helper()
	ref := topicEngine(t, addr, testConfig(t, "").Engine)
	var rows []string
	for i := 1; i <= 12; i++ {
		key := fmt.Sprintf("room-%d", i)
		switch i {
		case 1, 2, 3:
			key = "room-" + string(rune('a'+i-1))
		}
		rows = append(rows, fmt.Sprintf(`{"key":%q,"time":"2026-03-02T23:00:00Z","features":{"outdoor_c":6.5,"door_min":0,"shift":"night"}}`, key))
	}
	for _, name := range serviceSpecs {
		var first [][]byte
		for i, r := range rs {
			for j, row := range rows {
				code, b := r.call(t, "POST", "/v1/predict", "", []byte(fmt.Sprintf(`{"learner":%q,%s`, name, row[1:])))
				if code != 200 {
					t.Fatalf("instance %d, %s: %d %s", i, row, code, b)
				}
				b = withoutAnswerID(t, b) // each answer has an id of its own
				if i == 0 {
					first = append(first, b)
				} else if !bytes.Equal(b, first[j]) {
					t.Errorf("instance %d answers %s\ninstance 0 %s", i, b, first[j])
				}
				var resp PredictResponse
				json.Unmarshal(b, &resp)
				var ev learner.Event
				learner.DecodeRow([]byte(row), &ev)
				p, _ := ref.Predict(ev.Key, name, &ev)
				if resp.PredictAnswer == nil || resp.Prediction != p.Value {
					t.Errorf("%s %s: instance %d predicts %s, one engine over the topic %v", name, ev.Key, i, b, p.Value)
				}
			}
			code, b := r.call(t, "POST", "/v1/predict", "", []byte(fmt.Sprintf(`{"learner":%q,"rows":[%s]}`, name, bytes.Join(toBytes(rows), []byte(",")))))
			var resp PredictResponse
			if code != 200 || json.Unmarshal(b, &resp) != nil || len(resp.Predictions) != len(rows) {
				t.Fatalf("instance %d, all rows: %d %s", i, code, b)
			}
			for j, a := range resp.Predictions {
				var one PredictResponse
				json.Unmarshal(first[j], &one)
				if a.Key != one.Key || a.Prediction != one.Prediction {
					t.Errorf("instance %d, row %d of all: %+v, alone %+v", i, j, a, *one.PredictAnswer)
				}
			}
		}
	}
}

func toBytes(ss []string) [][]byte {
	out := make([][]byte, len(ss))
	for i, s := range ss {
		out[i] = []byte(s)
	}
	return out
}

// TestStaleOwnerIsFenced: an instance that still believes it owns a
// partition after the group gave it to another cannot overwrite the new
// owner's state: its checkpoint is refused (a newer generation wrote the
// partition's newest checkpoint), it gives the partition up, and the
// store's newest checkpoint stays the new owner's.
func TestStaleOwnerIsFenced(t *testing.T) {
	addr := groupBroker(t)
	produceKeyed(t, addr, roomsScenario(t, 1)[:600])
	ck := t.TempDir()
	r := start(t, groupConfig(t, addr, ck))
	r.waitGroup(t, 1, lastOffsets(t, addr))
	// A newer owner (generation 1000) writes partition 0's state.
	res := r.svc.loop.do(func(l *loop) cmdResult {
		ps := l.group.owned[0]
		if ps == nil {
			return cmdResult{err: fmt.Errorf("partition 0 not owned")}
		}
		moved := l.eng.Split([]int32{0})
		info, err := persist.SavePartition(ps.store, moved, 0, checkpoint.Handover, 0, 1000, "the new owner", nil)
		l.eng.Merge(moved)
		return cmdResult{info: info, err: err}
	})
	if res.err != nil {
		t.Fatal(res.err)
	}
	newer := res.info
	// The stale owner's next checkpoint of partition 0 is refused.
	code, b := r.call(t, "POST", "/v1/checkpoints", "", []byte("{}"))
	if code == 201 {
		t.Fatalf("a stale owner's checkpoint was written: %s", b)
	}
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: persist.PartitionDir(ck, 0), ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer store.Close()
	vs, _ := store.Versions()
	if vs[len(vs)-1] != newer.Version {
		t.Errorf("newest version of partition 0 is %d, want the new owner's %d", vs[len(vs)-1], newer.Version)
	}
	owned := r.svc.loop.do(func(l *loop) cmdResult {
		if l.group.owns(0) {
			return cmdResult{err: fmt.Errorf("still owns partition 0")}
		}
		if _, _, ok := l.eng.PartitionCounts(0); ok {
			return cmdResult{err: fmt.Errorf("still holds partition 0's state")}
		}
		return cmdResult{}
	})
	if owned.err != nil {
		t.Error(owned.err)
	}
}

// TestGroupRestore: a group-wide restore to a moment before a stretch of
// events, skipping those events by event time, leaves every partition as one
// engine over the topic would be had it passed over them (the reference
// applies the same messages and passes over the skipped ones, by the rule
// DESIGN.md states for skip); a per-partition restore asked of an instance
// that does not own the partition is done by its owner and, resuming from
// the checkpoint, reproduces the state exactly.
func TestGroupRestore(t *testing.T) {
	addr := groupBroker(t)
	lines := roomsScenario(t, 2)
	cut := len(lines) * 2 / 5
	produceKeyed(t, addr, lines[:cut])
	ck := t.TempDir()
	rs := []*running{start(t, groupConfig(t, addr, ck)), start(t, groupConfig(t, addr, ck))}
	first := lastOffsets(t, addr)
	rs[0].waitGroup(t, 2, first)
	for _, r := range rs {
		if code, b := r.call(t, "POST", "/v1/checkpoints", "", []byte("{}")); code != 201 {
			t.Fatalf("checkpoint: %d %s", code, b)
		}
	}
	before := time.Now().UTC()
	time.Sleep(10 * time.Millisecond)
	produceKeyed(t, addr, lines[cut:])
	last := lastOffsets(t, addr)
	rs[1].waitGroup(t, 2, last)

	from, to := "2026-03-02T06:00:00Z", "2026-03-02T12:00:00Z"
	body := fmt.Sprintf(`{"before":%q,"resume":"skip","skip_from_time":%q,"skip_to_time":%q}`, before.Format(time.RFC3339Nano), from, to)
	code, b := rs[1].call(t, "POST", "/v1/cluster/restore", "", []byte(body))
	var gr GroupRestoreResult
	if code != 200 || json.Unmarshal(b, &gr) != nil || len(gr.Partitions) != groupParts {
		t.Fatalf("group restore: %d %s", code, b)
	}
	for _, pr := range gr.Partitions {
		if !pr.Restored || pr.Version == 0 || pr.Checkpoint == nil || pr.Checkpoint.Reason != checkpoint.Restore {
			t.Errorf("partition %d not restored: %+v", pr.Partition, pr)
		}
	}
	// Reference: every message; those after the restored checkpoints whose
	// time is in the skipped range are passed over.
	f, _ := time.Parse(time.RFC3339, from)
	u, _ := time.Parse(time.RFC3339, to)
	skipped := 0
	ref := topicEngineWith(t, addr, testConfig(t, "").Engine, last, func(pos learner.Position, ev *learner.Event) bool {
		skip := pos.Offset > first[pos.Partition].Offset && ev.HasTime && ev.Time >= f.UnixNano() && ev.Time < u.UnixNano()
		if skip {
			skipped++
		}
		return skip
	})
	if skipped == 0 {
		t.Fatal("the skipped range holds no event")
	}
	rep := rs[0].waitGroup(t, 2, last)
	for rep.Skipped != int64(skipped) {
		time.Sleep(50 * time.Millisecond)
		rep = rs[0].waitGroup(t, 2, last)
	}
	sameAsTopic(t, "group-wide report after a group-wide restore that skipped a range", rep, ref)

	// One partition restored again the same way, asked of the instance
	// that does not own it: its owner does it, and the state is the same.
	var cv ClusterView
	_, b = rs[0].call(t, "GET", "/v1/cluster", "", nil)
	json.Unmarshal(b, &cv)
	var p int32 = -1
	var asked *running
	for _, in := range cv.Instances {
		if len(in.Partitions) > 0 && in.Address != "http://"+rs[0].svc.Addr() {
			p, asked = in.Partitions[0].Partition, rs[0]
		} else if len(in.Partitions) > 0 {
			p, asked = in.Partitions[0].Partition, rs[1]
		}
	}
	v := gr.Partitions[p].Version
	code, b = asked.call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", v), "",
		[]byte(fmt.Sprintf(`{"partition":%d,"resume":"skip","skip_from_time":%q,"skip_to_time":%q}`, p, from, to)))
	if code != 200 {
		t.Fatalf("restore of partition %d through a non-owner: %d %s", p, code, b)
	}
	sameAsTopic(t, "group-wide report after restoring one partition", rs[1].waitGroup(t, 2, last), ref)
	// Without a partition, a restore in a group says what to do.
	if code, b := rs[0].call(t, "POST", fmt.Sprintf("/v1/checkpoints/%d/restore", v), "", []byte(`{"resume":"from_checkpoint"}`)); code != 400 || !bytes.Contains(b, []byte("partition")) {
		t.Errorf("restore without a partition: %d %s", code, b)
	}
}

// TestWholeStateCheckpointCarriesOver: a service that kept a whole-state
// checkpoint before it was an instance of a consumer group goes on from it:
// each partition's state is taken from it when the partition is first
// assigned (the reference passed over the first event of every partition,
// which a read of the topic from its start would not), and written to the
// partition's own store.
func TestWholeStateCheckpointCarriesOver(t *testing.T) {
	addr := groupBroker(t)
	lines := roomsScenario(t, 1)
	produceKeyed(t, addr, lines[:600])
	cfg := groupConfig(t, addr, "")
	cfg.CheckpointDir = "" // the default, DATA/checkpoints, where the whole state is
	firstOfEach := func(pos learner.Position, _ *learner.Event) bool { return pos.Offset == 0 }
	old := topicEngineWith(t, addr, cfg.Engine, lastOffsets(t, addr), firstOfEach)
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: filepath.Join(cfg.DataDir, "checkpoints")})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := persist.Save(store, old, checkpoint.Shutdown, 0, nil); err != nil {
		t.Fatal(err)
	}
	store.Close()
	produceKeyed(t, addr, lines[600:])
	last := lastOffsets(t, addr)
	r := start(t, cfg)
	got := r.waitGroup(t, 1, last)
	sameAsTopic(t, "report after taking the whole-state checkpoint over", got, topicEngineWith(t, addr, cfg.Engine, last, firstOfEach))
	if got.Skipped != groupParts {
		t.Errorf("skipped %d, want %d (the first event of each partition, passed over before)", got.Skipped, groupParts)
	}
	for p := range int32(groupParts) {
		s, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: persist.PartitionDir(filepath.Join(cfg.DataDir, "checkpoints"), p), ReadOnly: true})
		if err != nil {
			t.Fatalf("partition %d: %v", p, err)
		}
		if vs, _ := s.Versions(); len(vs) == 0 {
			t.Errorf("partition %d's store holds no checkpoint", p)
		}
		s.Close()
	}
}
