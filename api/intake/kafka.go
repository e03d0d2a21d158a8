package intake

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"github.com/segmentio/kafka-go"

	"tidemark/learner"
)

// Kafka intake. Delivery semantics, in full:
//
//   - The service joins a Kafka consumer group (kafka-go's ConsumerGroup) only
//     to learn which partitions are its own. It does not start from the
//     group's committed offsets: on every assignment each partition is read
//     (with a partition reader) from the offset after the one the engine's
//     state covers — the newest checkpoint's position at start, and what was
//     already handed over since. The state is therefore exactly-once however
//     often the group rebalances or the process restarts.
//   - Offsets are committed to the group only after a checkpoint covering
//     them is durable (Commit), so that the group's lag shows how far the
//     durable state is behind; committed offsets are never read back.
//   - A message may still be handed over twice (a rebalance, a reconnect);
//     the engine ignores a position its state already covers.
//   - Per-key order is Kafka's: a key lives in one partition.
//
// A partition that has never been checkpointed is read from its first offset.

// KafkaConfig configures the Kafka intake.
type KafkaConfig struct {
	Brokers []string // bootstrap brokers, host:port. Required.
	Topic   string   // Required.
	Group   string   // consumer group. Default: "tidemark".
	// MaxWait bounds how long a fetch waits for new messages. Default: 250ms.
	MaxWait time.Duration
	// RebalanceTimeout is how long, in group mode, the group waits for a
	// member to checkpoint the partitions it gives up before going on
	// without it (its checkpoint is then fenced, and the next owner
	// resumes from the one before). It is also how long a rebalance may
	// wait for a member that was killed. Default: 10s.
	RebalanceTimeout time.Duration
	Log              *slog.Logger // Nil discards.
}

// Validate reports every problem with c. It changes nothing.
func (c *KafkaConfig) Validate() error {
	var errs []error
	if len(c.Brokers) == 0 {
		errs = append(errs, errors.New("kafka: no brokers given (--kafka-brokers host:port,...)"))
	}
	for _, b := range c.Brokers {
		if b == "" {
			errs = append(errs, errors.New("kafka: an empty broker address"))
		}
	}
	if c.Topic == "" {
		errs = append(errs, errors.New("kafka: no topic given (--kafka-topic T)"))
	}
	return errors.Join(errs...)
}

// Kafka reads events from a topic. Safe for concurrent use.
type Kafka struct {
	cfg    KafkaConfig
	client *kafka.Client

	mu        sync.Mutex
	gen       *kafka.Generation
	next      map[int32]int64 // next offset to hand over, per partition
	high      map[int32]int64 // high watermark (next offset to be written)
	connected bool
	outage    time.Time
	refreshed atomic.Bool // the high watermarks were read at least once
	numParts  int         // the topic's partitions, as last read

	// group mode (SetOwner; group.go)
	owner     Owner
	self      []byte // this member's user data
	members   []Member
	membersAt time.Time
}

// String names the topic, for messages.
func (k *Kafka) String() string { return fmt.Sprintf("the Kafka topic %q", k.cfg.Topic) }

// NewKafka prepares the intake; nothing connects until Run.
func NewKafka(cfg KafkaConfig) (*Kafka, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	if cfg.Group == "" {
		cfg.Group = "tidemark"
	}
	if cfg.MaxWait == 0 {
		cfg.MaxWait = 250 * time.Millisecond
	}
	if cfg.RebalanceTimeout == 0 {
		cfg.RebalanceTimeout = 10 * time.Second
	}
	if cfg.Log == nil {
		cfg.Log = slog.New(slog.DiscardHandler)
	}
	return &Kafka{cfg: cfg, client: &kafka.Client{Addr: kafka.TCP(cfg.Brokers...), Timeout: 10 * time.Second},
		next: map[int32]int64{}, high: map[int32]int64{}}, nil
}

// Connected reports whether the last exchange with the brokers succeeded,
// and since when they have been unreachable otherwise.
func (k *Kafka) Connected() (bool, time.Time) {
	k.mu.Lock()
	defer k.mu.Unlock()
	return k.connected, k.outage
}

func (k *Kafka) setConnected(ok bool, err error) {
	k.mu.Lock()
	defer k.mu.Unlock()
	if ok == k.connected {
		return
	}
	k.connected = ok
	if ok && k.outage.IsZero() {
		k.cfg.Log.Info("kafka: connected", "brokers", k.cfg.Brokers)
	} else if ok {
		k.cfg.Log.Info("kafka: connected", "brokers", k.cfg.Brokers, "down_for", time.Since(k.outage).Round(time.Millisecond).String())
	} else {
		k.outage = time.Now()
		k.cfg.Log.Warn("kafka: brokers unreachable; retrying with backoff", "error", err)
	}
}

// HighWater returns, for each non-empty partition, the offset of its last
// message as of the latest refresh.
func (k *Kafka) HighWater() []learner.Position {
	k.mu.Lock()
	defer k.mu.Unlock()
	var out []learner.Position
	for p, hw := range k.high {
		if hw > 0 {
			out = append(out, learner.Position{Partition: p, Offset: hw - 1})
		}
	}
	slices.SortFunc(out, func(a, b learner.Position) int { return int(a.Partition - b.Partition) })
	return out
}

// Refresh reads the topic's high watermarks.
func (k *Kafka) Refresh(ctx context.Context) error {
	ctx, cancel := context.WithTimeout(ctx, 2*time.Second)
	defer cancel()
	md, err := k.client.Metadata(ctx, &kafka.MetadataRequest{Topics: []string{k.cfg.Topic}})
	if err != nil {
		return err
	}
	if len(md.Topics) != 1 || md.Topics[0].Error != nil {
		if len(md.Topics) == 1 {
			return fmt.Errorf("kafka: topic %q: %w", k.cfg.Topic, md.Topics[0].Error)
		}
		return fmt.Errorf("kafka: topic %q not found", k.cfg.Topic)
	}
	k.mu.Lock()
	k.numParts = len(md.Topics[0].Partitions)
	k.mu.Unlock()
	var reqs []kafka.OffsetRequest
	for _, p := range md.Topics[0].Partitions {
		reqs = append(reqs, kafka.LastOffsetOf(p.ID))
	}
	res, err := k.client.ListOffsets(ctx, &kafka.ListOffsetsRequest{Topics: map[string][]kafka.OffsetRequest{k.cfg.Topic: reqs}})
	if err != nil {
		return err
	}
	k.mu.Lock()
	defer k.mu.Unlock()
	for _, po := range res.Topics[k.cfg.Topic] {
		if po.Error == nil {
			k.high[int32(po.Partition)] = po.LastOffset
		}
	}
	k.refreshed.Store(true)
	return nil
}

// Run consumes until ctx is done. covered is what the engine's state covers;
// deliver is called in offset order within each partition, from one
// goroutine per partition (so concurrently across partitions), and returns
// false to stop.
func (k *Kafka) Run(ctx context.Context, covered []learner.Position, deliver func(learner.Position, []byte) bool) error {
	k.mu.Lock()
	for _, p := range covered {
		if p.Offset+1 > k.next[p.Partition] {
			k.next[p.Partition] = p.Offset + 1
		}
	}
	k.mu.Unlock()
	go k.watchHighWater(ctx)
	backoff := 100 * time.Millisecond
	for ctx.Err() == nil {
		gc := kafka.ConsumerGroupConfig{ID: k.cfg.Group, Brokers: k.cfg.Brokers,
			Topics: []string{k.cfg.Topic}, Timeout: 5 * time.Second, HeartbeatInterval: time.Second,
			SessionTimeout: 10 * time.Second, RebalanceTimeout: 10 * time.Second, JoinGroupBackoff: time.Second}
		k.mu.Lock()
		if k.owner != nil {
			gc.GroupBalancers = []kafka.GroupBalancer{memberBalancer{data: k.self}}
			// A member checkpoints its partitions before it rejoins: the
			// others wait for it this long before they go on without it.
			gc.RebalanceTimeout = k.cfg.RebalanceTimeout
		}
		k.mu.Unlock()
		group, err := kafka.NewConsumerGroup(gc)
		if err != nil {
			return fmt.Errorf("kafka: %w", err)
		}
		err = k.runGroup(ctx, group, deliver)
		group.Close()
		if ctx.Err() != nil {
			return nil
		}
		var kerr kafka.Error
		if errors.As(err, &kerr) {
			// The brokers answered: a group protocol condition (a rebalance
			// in progress, a member that died and has not timed out yet).
			k.cfg.Log.Info("kafka: rejoining the consumer group", "reason", err)
		} else {
			k.setConnected(false, err)
		}
		select {
		case <-time.After(backoff):
		case <-ctx.Done():
			return nil
		}
		backoff = min(2*backoff, 10*time.Second)
	}
	return nil
}

func (k *Kafka) runGroup(ctx context.Context, group *kafka.ConsumerGroup, deliver func(learner.Position, []byte) bool) error {
	for {
		gen, err := group.Next(ctx)
		if err != nil {
			return err
		}
		k.setConnected(true, nil)
		k.mu.Lock()
		k.gen = gen
		owner := k.owner
		k.mu.Unlock()
		var parts []int32
		for _, a := range gen.Assignments[k.cfg.Topic] {
			parts = append(parts, int32(a.ID))
		}
		slices.Sort(parts)
		if owner != nil {
			if err := k.startOwned(ctx, gen, owner, parts, deliver); err != nil {
				k.cfg.Log.Error("kafka: cannot take the assigned partitions; rejoining", "partitions", parts, "error", err)
			}
			continue
		}
		for _, part := range parts {
			gen.Start(func(gctx context.Context) { k.readPartition(ctx, gctx, part, deliver) })
		}
	}
}

// startOwned runs a generation in group mode: the owner takes the assigned
// partitions (loading their state) and says where to read from; when the
// generation ends, it is given them back once their readers stopped.
func (k *Kafka) startOwned(ctx context.Context, gen *kafka.Generation, owner Owner, parts []int32, deliver func(learner.Position, []byte) bool) error {
	g := Generation{ID: gen.ID, MemberID: gen.MemberID}
	k.refreshMembers(ctx) // best effort; the watcher reads them again
	covered, err := owner.Assigned(g, parts)
	if err != nil {
		owner.Revoked(g, parts)
		gen.Start(func(context.Context) {}) // ends the generation: the group is rejoined
		return err
	}
	k.mu.Lock()
	for _, p := range parts {
		if off, ok := covered[p]; ok {
			k.next[p] = off + 1
		} else {
			delete(k.next, p)
		}
	}
	k.mu.Unlock()
	var readers sync.WaitGroup
	readers.Add(len(parts))
	for _, part := range parts {
		gen.Start(func(gctx context.Context) {
			defer readers.Done()
			k.readPartition(ctx, gctx, part, deliver)
		})
	}
	gen.Start(func(gctx context.Context) {
		<-gctx.Done()
		readers.Wait()
		owner.Revoked(g, parts)
	})
	return nil
}

func (k *Kafka) readPartition(ctx, gctx context.Context, part int32, deliver func(learner.Position, []byte) bool) {
	k.mu.Lock()
	start, ok := k.next[part]
	k.mu.Unlock()
	if !ok {
		start = kafka.FirstOffset
	}
	r := kafka.NewReader(kafka.ReaderConfig{Brokers: k.cfg.Brokers, Topic: k.cfg.Topic, Partition: int(part),
		MinBytes: 1, MaxBytes: 16 << 20, MaxWait: k.cfg.MaxWait, ReadBackoffMin: 100 * time.Millisecond, ReadBackoffMax: 5 * time.Second})
	defer r.Close()
	if err := r.SetOffset(start); err != nil {
		k.cfg.Log.Error("kafka: cannot set offset", "partition", part, "offset", start, "error", err)
		return
	}
	rctx, cancel := context.WithCancel(ctx)
	defer cancel()
	go func() {
		select {
		case <-gctx.Done():
			cancel()
		case <-rctx.Done():
		}
	}()
	for {
		m, err := r.FetchMessage(rctx)
		if err != nil {
			if rctx.Err() == nil && !errors.Is(err, io.EOF) {
				k.setConnected(false, err)
			}
			return
		}
		// Partitions are read concurrently; each calls deliver in its own
		// offset order, which is all the engine needs (a key lives in one
		// partition, and the state does not depend on the interleaving).
		v := m.Value
		if v == nil {
			v = []byte{} // an empty message (nil is kept for what a source could not read)
		}
		if !deliver(learner.Position{Partition: part, Offset: m.Offset}, v) {
			return
		}
		k.mu.Lock()
		k.next[part] = m.Offset + 1
		k.mu.Unlock()
	}
}

func (k *Kafka) watchHighWater(ctx context.Context) {
	t := time.NewTicker(time.Second)
	defer t.Stop()
	for {
		if err := k.Refresh(ctx); err != nil && ctx.Err() == nil {
			k.setConnected(false, err)
		} else if err == nil {
			k.setConnected(true, nil)
			k.mu.Lock()
			group := k.owner != nil
			k.mu.Unlock()
			if group {
				if err := k.refreshMembers(ctx); err != nil && ctx.Err() == nil {
					k.cfg.Log.Warn("kafka: cannot read the group's members", "error", err)
				}
			}
		}
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

// Commit records in the group the offsets a durable checkpoint covers (the
// next offset to read, as Kafka expects). It is best effort: a failure is
// logged and the next checkpoint commits again.
func (k *Kafka) Commit(covered []learner.Position) {
	k.mu.Lock()
	gen := k.gen
	k.mu.Unlock()
	if gen == nil || len(covered) == 0 {
		return
	}
	offs := map[int]int64{}
	for _, p := range covered {
		offs[int(p.Partition)] = p.Offset + 1
	}
	if err := gen.CommitOffsets(map[string]map[int]int64{k.cfg.Topic: offs}); err != nil {
		k.cfg.Log.Warn("kafka: offset commit failed; the next checkpoint retries", "error", err)
	}
}

// Close releases the client's connections.
func (k *Kafka) Close() error { return nil }

// Drain reads every partition of the topic up to the given last offsets
// with plain kafka-go partition readers, concurrently, and returns the
// messages read and when the first arrived. It is the floor of the
// kafka-intake benchmark: the cost of fetching the same messages with
// nothing else done.
func Drain(ctx context.Context, brokers []string, topic string, last []learner.Position) (int64, time.Time, error) {
	var wg sync.WaitGroup
	var mu sync.Mutex
	var total int64
	var first time.Time
	var firstErr error
	for _, p := range last {
		wg.Add(1)
		go func() {
			defer wg.Done()
			r := kafka.NewReader(kafka.ReaderConfig{Brokers: brokers, Topic: topic, Partition: int(p.Partition), MinBytes: 1, MaxBytes: 16 << 20, MaxWait: 250 * time.Millisecond})
			defer r.Close()
			n := int64(0)
			for {
				m, err := r.FetchMessage(ctx)
				if err != nil {
					mu.Lock()
					firstErr = errors.Join(firstErr, err)
					mu.Unlock()
					return
				}
				if n == 0 {
					mu.Lock()
					if first.IsZero() {
						first = time.Now()
					}
					mu.Unlock()
				}
				n++
				if m.Offset >= p.Offset {
					break
				}
			}
			mu.Lock()
			total += n
			mu.Unlock()
		}()
	}
	wg.Wait()
	return total, first, firstErr
}
