package intake

import (
	"context"
	"errors"
	"fmt"
	"io"
	"time"

	"tidemark/learner"
)

// Source is one stream of events a service learns from — the local journal
// (fed over HTTP), a Kafka topic, or a history file — behind one contract,
// so that the service knows no source by name. Every event comes with its
// position; a position is never reused for a different event.
//
// Implementations are safe for concurrent use: Run runs on a goroutine of
// its own while the service asks the rest.
type Source interface {
	// Run delivers, in position order within each partition, every event
	// after the covered positions, until ctx is done (then it returns nil),
	// deliver returns false, or the source fails. deliver owns each payload
	// it is given (it may keep it); a nil payload is an event at that
	// position the source could not read (a history line past
	// MaxLineBytes), to be rejected by position. A journal's damage is a
	// *DamageError.
	Run(ctx context.Context, covered []learner.Position, deliver func(learner.Position, []byte) bool) error
	// Available returns, per partition, the position of the last event the
	// source holds now, and whether that is known yet (a Kafka topic's is
	// not until the brokers first answer). A service is caught up once its
	// state covers these.
	Available() (last []learner.Position, known bool)
	// Checkpointed says that a durable checkpoint covers newest and that
	// every retained checkpoint covers oldest: the source may commit
	// (Kafka) or forget (the journal) what precedes them.
	Checkpointed(newest, oldest []learner.Position)
	// Health returns nil while the source can deliver, an *Outage while it
	// cannot for a while (brokers unreachable), or ErrJournalVanished (wrapped)
	// when its files are gone.
	Health() error
	// Close releases the source.
	Close() error
}

// Appender is a Source that takes events over HTTP: the journal.
type Appender interface {
	// Append stores payloads durably as consecutive events and returns the
	// positions (offsets in partition 0) of the first and last.
	Append(payloads [][]byte) (first, last int64, err error)
}

// Outage is a source's transient failure to reach what it reads from.
type Outage struct {
	What  string    // "the Kafka brokers"
	Since time.Time // zero when not known
}

func (o *Outage) Error() string {
	if o.Since.IsZero() {
		return fmt.Sprintf("%s are unreachable; reconnecting with backoff", o.What)
	}
	return fmt.Sprintf("%s have been unreachable since %s; reconnecting with backoff", o.What, o.Since.UTC().Format(time.RFC3339))
}

var (
	_ Source   = (*Journal)(nil)
	_ Appender = (*Journal)(nil)
	_ Source   = (*Kafka)(nil)
	_ Source   = (*HistorySource)(nil)
)

// Run implements Source: it reads the journal after the covered offset of
// partition 0, waiting for new durable records, until ctx is done.
func (j *Journal) Run(ctx context.Context, covered []learner.Position, deliver func(learner.Position, []byte) bool) error {
	from := int64(1)
	for _, p := range covered {
		if p.Partition == 0 {
			from = p.Offset + 1
		}
	}
	r := j.Reader(from)
	defer r.Close()
	for {
		off, p, err := r.Next(ctx)
		if err != nil {
			if ctx.Err() != nil || errors.Is(err, ErrJournalClosed) {
				return nil
			}
			return err
		}
		if !deliver(learner.Position{Partition: 0, Offset: off}, append(make([]byte, 0, len(p)), p...)) {
			return nil
		}
	}
}

// Available implements Source: the last durable offset.
func (j *Journal) Available() ([]learner.Position, bool) {
	if d := j.Durable(); d > 0 {
		return []learner.Position{{Partition: 0, Offset: d}}, true
	}
	return nil, true
}

// Checkpointed implements Source: segments every retained checkpoint covers
// are deleted.
func (j *Journal) Checkpointed(_, oldest []learner.Position) {
	for _, p := range oldest {
		if p.Partition == 0 && p.Offset > 0 {
			j.DeleteBefore(p.Offset + 1) // a failure is retried after the next checkpoint
		}
	}
}

// Health implements Source (see Check).
func (j *Journal) Health() error { return j.Check() }

// String names the source, for messages.
func (j *Journal) String() string { return "its journal" }

// Available implements Source: the topic's high watermarks, known once the
// brokers have answered (an empty topic is known when connected).
func (k *Kafka) Available() ([]learner.Position, bool) {
	hw := k.HighWater()
	if len(hw) > 0 {
		return hw, true
	}
	ok, _ := k.Connected()
	return nil, ok || k.refreshed.Load()
}

// Checkpointed implements Source: the offsets the newest durable checkpoint
// covers are committed.
func (k *Kafka) Checkpointed(newest, _ []learner.Position) { k.Commit(newest) }

// Health implements Source: an *Outage while the brokers are unreachable.
func (k *Kafka) Health() error {
	if ok, since := k.Connected(); !ok {
		return &Outage{What: "the Kafka brokers", Since: since}
	}
	return nil
}

// HistorySource serves a history file (see History) as a stream: position
// (0, line number). Its events are all available from the start; there is
// nothing to commit or trim.
type HistorySource struct {
	path   string
	fields Fields
	lines  int64
}

// OpenHistorySource checks that path reads as a history file (in the format
// its name says, its fields mapped by fields) and counts its lines.
func OpenHistorySource(path string, fields Fields) (*HistorySource, error) {
	h, err := OpenHistoryAs(path, FormatOf(path), fields)
	if err != nil {
		return nil, err
	}
	defer h.Close()
	var n int64
	for {
		_, line, err := h.Next()
		if errors.Is(err, ErrLineTooLong) || errors.Is(err, ErrBadRow) {
			n = line
			continue
		}
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, err
		}
		n = line
	}
	return &HistorySource{path: path, fields: fields, lines: n}, nil
}

// Run implements Source. A line past MaxLineBytes is delivered as a nil
// payload (the service rejects it by position, saying why); a row that is
// not an event (ErrBadRow) as the text of its error, which the service
// refuses, keeping it in the dead letters. Rows of CSV and Parquet
// histories, and lines of a mapped NDJSON history, are delivered as
// canonical events.
func (h *HistorySource) Run(ctx context.Context, covered []learner.Position, deliver func(learner.Position, []byte) bool) error {
	skip := int64(0)
	for _, p := range covered {
		if p.Partition == 0 {
			skip = p.Offset
		}
	}
	f, err := OpenHistoryAs(h.path, FormatOf(h.path), h.fields)
	if err != nil {
		return err
	}
	defer f.Close()
	for {
		if ctx.Err() != nil {
			return nil
		}
		b, line, err := f.Next()
		tooLong := errors.Is(err, ErrLineTooLong)
		if tooLong {
			err = nil
		}
		if errors.Is(err, ErrBadRow) {
			b, err = []byte(err.Error()), nil
		}
		if err != nil {
			if errors.Is(err, io.EOF) {
				<-ctx.Done() // all delivered: nothing more will come
				return nil
			}
			return err
		}
		if line <= skip {
			continue
		}
		var data []byte // nil: the line was too long to read
		if !tooLong {
			data = append(make([]byte, 0, len(b)), b...)
		}
		if !deliver(learner.Position{Partition: 0, Offset: line}, data) {
			return nil
		}
	}
}

// Available implements Source: the file's last line.
func (h *HistorySource) Available() ([]learner.Position, bool) {
	if h.lines == 0 {
		return nil, true
	}
	return []learner.Position{{Partition: 0, Offset: h.lines}}, true
}

// Checkpointed implements Source; a history file keeps everything.
func (h *HistorySource) Checkpointed(_, _ []learner.Position) {}

// Health implements Source.
func (h *HistorySource) Health() error { return nil }

// Close implements Source.
func (h *HistorySource) Close() error { return nil }

// String names the file, for messages.
func (h *HistorySource) String() string { return "the history file " + h.path }
