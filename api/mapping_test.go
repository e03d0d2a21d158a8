package api

import (
	"context"

	"encoding/json"
	"fmt"
	"github.com/segmentio/kafka-go"
	"strings"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/learner"
)

// TestMappedEventsOverHTTP: events in another shape — device_id, kwh, the
// time in epoch milliseconds under ts, the features nested under readings,
// one renamed — posted to a service configured with that mapping, give the
// report a replay of the same events in tidemark's own shape gives, to the
// byte; and a mapping with two problems is refused at start naming both.
func TestMappedEventsOverHTTP(t *testing.T) {
	lines := scenario(t, 2)
	mapped := mapLines(t, lines)
	cfg := testConfig(t, t.TempDir())
	cfg.Fields = testMapping
	r := start(t, cfg)
	r.post(t, "", mapped)
	got := r.waitCovered(t, int64(len(mapped)))
	got.Served = nil
	sameJSON(t, "report of the mapped events", got, replayReport(t, engineConfig(t, serviceSpecs...), lines))

	bad := testConfig(t, t.TempDir())
	bad.Fields = intake.Fields{Time: "a", Key: "a", TimeFormat: "ymd", Rename: map[string]string{"x": "z", "y": "z"}}
	_, err := New(bad)
	if err == nil {
		t.Fatal("a bad mapping was taken")
	}
	for _, want := range []string{"must differ", "time format", "both become"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("the refusal does not name %q: %v", want, err)
		}
	}
}

// TestMappedEventsFromKafka: the same mapped events as Kafka messages (each
// room in a partition of its own) give the report of a replay of the
// canonical events taken partition by partition.
func TestMappedEventsFromKafka(t *testing.T) {
	addr := broker(t)
	lines := scenario(t, 2)
	mapped := mapLines(t, lines)
	w := &kafka.Writer{Addr: kafka.TCP(addr), Topic: topic, Balancer: roomBalancer{}, RequiredAcks: kafka.RequireAll, BatchSize: 500, BatchTimeout: 10 * time.Millisecond}
	byRoom := map[string][][]byte{}
	var msgs []kafka.Message
	var ev learner.Event
	for i, l := range lines {
		learner.DecodeEvent(l, &ev)
		byRoom[ev.Key] = append(byRoom[ev.Key], l)
		msgs = append(msgs, kafka.Message{Key: []byte(ev.Key), Value: mapped[i]})
	}
	if err := w.WriteMessages(context.Background(), msgs...); err != nil {
		t.Fatal(err)
	}
	w.Close()
	cfg := kafkaConfig(t, addr, t.TempDir())
	cfg.Fields = testMapping
	r := start(t, cfg)
	got := r.waitPositions(t, lastOffsets(t, addr))
	got.Served = nil
	var ordered [][]byte
	for _, room := range []string{"room-a", "room-b", "room-c"} {
		ordered = append(ordered, byRoom[room]...)
	}
	sameJSON(t, "Kafka report of the mapped events", withoutPositions(got), withoutPositions(replayReport(t, engineConfig(t, serviceSpecs...), ordered)))
}

// testMapping reads the events mapLines writes.
var testMapping = intake.Fields{Time: "ts", TimeFormat: intake.TimeUnixMS, Key: "device_id", Target: "kwh", FeaturesFrom: []string{"readings"},
	Rename: map[string]string{"door": "door_min"}}

// mapLines writes canonical events in another shape: device_id, kwh, the
// time in epoch milliseconds under ts, the features nested under readings
// but door_min, top-level as door.
func mapLines(t *testing.T, lines [][]byte) [][]byte {
	var mapped [][]byte
	for _, l := range lines {
		var ev struct {
			Time     string                     `json:"time"`
			Key      string                     `json:"key"`
			Features map[string]json.RawMessage `json:"features"`
			Target   json.RawMessage            `json:"target"`
		}
		if err := json.Unmarshal(l, &ev); err != nil {
			t.Fatal(err)
		}
		tm, _ := time.Parse(time.RFC3339, ev.Time)
		door := ev.Features["door_min"]
		delete(ev.Features, "door_min")
		feats, _ := json.Marshal(ev.Features)
		mapped = append(mapped, fmt.Appendf(nil, `{"ts":%d,"device_id":%q,"readings":%s,"door":%s,"kwh":%s}`, tm.UnixMilli(), ev.Key, feats, door, ev.Target))
	}
	return mapped
}
