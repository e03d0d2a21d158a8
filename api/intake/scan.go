package intake

import (
	"context"
	"errors"
	"fmt"
	"sync"

	"github.com/segmentio/kafka-go"

	"tidemark/learner"
)

// Scanner is a Source that can read back a range of what it holds without
// changing anything (the Kafka intake: partition readers, outside the
// consumer group).
type Scanner interface {
	Scan(ctx context.Context, after, upTo []learner.Position, fn func(learner.Position, []byte)) error
}

// Scan calls fn with every event src holds after the positions after, up to
// and including upTo, partition by partition in position order; a partition
// absent from after is read from its start. Sources without a Scan of their
// own (the journal, a history file) are read with Run, which ends once every
// partition reached its position. It is what a restore's dry run counts.
func Scan(ctx context.Context, src Source, after, upTo []learner.Position, fn func(learner.Position, []byte)) error {
	if s, ok := src.(Scanner); ok {
		return s.Scan(ctx, after, upTo, fn)
	}
	left := map[int32]int64{}
	for _, p := range upTo {
		if p.Offset > offsetOf(after, p.Partition) {
			left[p.Partition] = p.Offset
		}
	}
	if len(left) == 0 {
		return nil
	}
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	var mu sync.Mutex
	err := src.Run(ctx, after, func(pos learner.Position, b []byte) bool {
		mu.Lock()
		defer mu.Unlock()
		end, ok := left[pos.Partition]
		if !ok || pos.Offset > end {
			return true
		}
		fn(pos, b)
		if pos.Offset == end {
			delete(left, pos.Partition)
			if len(left) == 0 {
				cancel()
				return false
			}
		}
		return true
	})
	mu.Lock()
	defer mu.Unlock()
	switch {
	case err != nil:
		return err
	case len(left) > 0:
		// Our cancel comes only once every partition is read: the caller
		// gave up, or the source ended short.
		return errors.Join(errors.New("intake: the source ended before the positions asked for"), ctx.Err())
	}
	return nil
}

func offsetOf(ps []learner.Position, p int32) int64 {
	for _, q := range ps {
		if q.Partition == p {
			return q.Offset
		}
	}
	return -1
}

// Scan implements Scanner with a partition reader per partition.
func (k *Kafka) Scan(ctx context.Context, after, upTo []learner.Position, fn func(learner.Position, []byte)) error {
	for _, p := range upTo {
		start := offsetOf(after, p.Partition) + 1
		if start > p.Offset {
			continue
		}
		if err := k.scanPartition(ctx, p, start, fn); err != nil {
			return fmt.Errorf("kafka: reading partition %d back: %w", p.Partition, err)
		}
	}
	return nil
}

func (k *Kafka) scanPartition(ctx context.Context, upTo learner.Position, start int64, fn func(learner.Position, []byte)) error {
	r := kafka.NewReader(kafka.ReaderConfig{Brokers: k.cfg.Brokers, Topic: k.cfg.Topic, Partition: int(upTo.Partition),
		MinBytes: 1, MaxBytes: 16 << 20, MaxWait: k.cfg.MaxWait})
	defer r.Close()
	if err := r.SetOffset(start); err != nil {
		return err
	}
	for {
		m, err := r.FetchMessage(ctx)
		if err != nil {
			return err
		}
		if m.Offset > upTo.Offset {
			return nil
		}
		fn(learner.Position{Partition: upTo.Partition, Offset: m.Offset}, m.Value)
		if m.Offset == upTo.Offset {
			return nil
		}
	}
}
