package api

import (
	"bufio"
	"encoding/json"
	"fmt"
	"os"
	"sync/atomic"

	"tidemark/learner"
)

// deadLetters is the file of rejected stream events: one JSON object per
// line with the position, the reason and the event as received (cut at
// 64 KiB). It is not a log: it holds payloads, so it lives in the data
// directory with mode 0600. Writes are buffered and flushed on each
// checkpoint and at close; losing the tail in a crash loses no event (the
// journal or topic still holds it).
type deadLetters struct {
	f *os.File
	w *bufio.Writer
	n atomic.Int64
}

const maxDeadPayload = 64 << 10

type deadLetter struct {
	Position learner.Position `json:"position"`
	Reason   string           `json:"reason"`
	Event    string           `json:"event"`
}

func openDeadLetters(path string) (*deadLetters, error) {
	f, err := os.OpenFile(path, os.O_WRONLY|os.O_CREATE|os.O_APPEND, 0o600)
	if err != nil {
		return nil, fmt.Errorf("dead letters: %w", err)
	}
	return &deadLetters{f: f, w: bufio.NewWriter(f)}, nil
}

func (d *deadLetters) add(pos learner.Position, reason error, data []byte) {
	if len(data) > maxDeadPayload {
		data = data[:maxDeadPayload]
	}
	b, _ := json.Marshal(deadLetter{Position: pos, Reason: reason.Error(), Event: string(data)})
	d.w.Write(append(b, '\n'))
	d.n.Add(1)
}

func (d *deadLetters) count() int64 { return d.n.Load() }

func (d *deadLetters) flush() error { return d.w.Flush() }

func (d *deadLetters) Close() error {
	d.w.Flush()
	return d.f.Close()
}
