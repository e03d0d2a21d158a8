package api

import (
	"net"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kfake"
)

// cuttable wraps the broker's listener: cut drops every open connection and
// refuses new ones until restore — the network between service and broker
// failing and coming back.
type cuttable struct {
	net.Listener
	mu    sync.Mutex
	conns map[net.Conn]bool
	down  bool
}

func (c *cuttable) Accept() (net.Conn, error) {
	for {
		conn, err := c.Listener.Accept()
		if err != nil {
			return nil, err
		}
		c.mu.Lock()
		if c.down {
			c.mu.Unlock()
			conn.Close()
			continue
		}
		c.conns[conn] = true
		c.mu.Unlock()
		return conn, nil
	}
}

func (c *cuttable) cut() {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.down = true
	for conn := range c.conns {
		conn.Close()
	}
	c.conns = map[net.Conn]bool{}
}

func (c *cuttable) restore() { c.mu.Lock(); c.down = false; c.mu.Unlock() }

// TestBrokerOutage: the connection to the broker drops for a few seconds
// mid-stream. The service says so (readiness, metrics, log), reconnects with
// backoff, and ends with every event applied exactly once.
func TestBrokerOutage(t *testing.T) {
	var lis *cuttable
	cl, err := kfake.NewCluster(kfake.NumBrokers(1), kfake.SeedTopics(3, topic), kfake.ListenFn(func(network, addr string) (net.Listener, error) {
		l, err := net.Listen(network, addr)
		if err != nil {
			return nil, err
		}
		lis = &cuttable{Listener: l, conns: map[net.Conn]bool{}}
		return lis, nil
	}))
	if err != nil {
		t.Fatal(err)
	}
	defer cl.Close()
	addr := cl.ListenAddrs()[0]
	lines := scenario(t, 2)
	produce(t, addr, lines[:800])
	var log syncBuf
	cfg := kafkaConfig(t, addr, t.TempDir())
	cfg.Log = newTextLogger(&log)
	r := start(t, cfg)
	r.waitPositions(t, lastOffsets(t, addr))

	lis.cut()
	const outage = 4 * time.Second
	t0 := time.Now()
	sawDown, sawMetric := false, false
	for time.Since(t0) < outage {
		code, b := r.call(t, "GET", "/readyz", "", nil)
		if code == 503 && strings.Contains(string(b), "unreachable") {
			sawDown = true
		}
		_, m := r.call(t, "GET", "/metrics", "", nil)
		if strings.Contains(string(m), "tidemark_intake_connected 0") {
			sawMetric = true
		}
		time.Sleep(100 * time.Millisecond)
	}
	lis.restore()
	if !sawDown || !sawMetric {
		t.Errorf("during the outage: readiness said so %v, metric said so %v", sawDown, sawMetric)
	}
	produce(t, addr, lines[800:])
	last := lastOffsets(t, addr)
	got := r.waitPositions(t, last)
	deadline := time.Now().Add(20 * time.Second)
	for {
		code, _ := r.call(t, "GET", "/readyz", "", nil)
		if code == 200 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("not ready again after the outage")
		}
		time.Sleep(50 * time.Millisecond)
	}
	if got.Events != int64(len(lines)) || got.Duplicates != 0 {
		t.Errorf("after the outage: %d applied, %d duplicates; want %d and 0", got.Events, got.Duplicates, len(lines))
	}
	want := replayReport(t, engineConfig(t, serviceSpecs...), partitionOrder(t, addr, last))
	sameJSON(t, "after a broker outage", withoutPositions(got), withoutPositions(want))
	if !strings.Contains(log.String(), "unreachable") || !strings.Contains(log.String(), "kafka: connected") {
		t.Errorf("the log does not tell of the outage and the reconnection:\n%.2000s", log.String())
	}
	t.Logf("survived a %v outage; %d events, each applied once", outage, got.Events)
}
