package api

import (
	"bufio"
	"errors"
	"fmt"
	"os"
	"strconv"
	"strings"
	"sync/atomic"
	"unicode/utf8"

	"tidemark/learner"
)

// deadLetters is the file of rejected stream events: one JSON object per
// line with the position, the reason and the event as received (cut at
// 64 KiB). It is not a log: it holds payloads, so it lives in the data
// directory with mode 0600. Writes are buffered and flushed on each
// checkpoint and at close; losing the tail in a crash loses no event (the
// journal or topic still holds it).
//
// The file is bounded: once writing a line would take it past its limit it
// is renamed to deadletters.1.ndjson (replacing the previous one) and a new
// file is started, so the two together hold at most twice the limit.
type deadLetters struct {
	buf   []byte // the line being written
	path  string
	limit int64
	f     *os.File
	w     *bufio.Writer
	size  int64
	n     atomic.Int64
	err   error // the last rotation failure, reported once
}

const maxDeadPayload = 64 << 10

type deadLetter struct {
	Position learner.Position `json:"position"`
	Reason   string           `json:"reason"`
	Event    string           `json:"event"`
}

// appendDeadLetter appends the line json.Marshal writes for a deadLetter,
// and a newline, built by hand: a flood of rejected events then costs about
// what accepting them costs, not a reflection walk and three allocations each.
func appendDeadLetter(b []byte, pos learner.Position, reason string, data []byte) []byte {
	b = append(b, `{"position":{"partition":`...)
	b = strconv.AppendInt(b, int64(pos.Partition), 10)
	b = append(b, `,"offset":`...)
	b = strconv.AppendInt(b, pos.Offset, 10)
	b = append(b, `},"reason":`...)
	b = appendJSONString(b, reason)
	b = append(b, `,"event":`...)
	b = appendJSONString(b, string(data))
	return append(b, "}\n"...)
}

// appendJSONString appends s as encoding/json writes a string: quoted, with
// <, > and & as \u escapes, control characters escaped, U+2028 and U+2029
// escaped, and each invalid UTF-8 byte as U+FFFD.
func appendJSONString(b []byte, s string) []byte {
	const hex = "0123456789abcdef"
	b = append(b, '"')
	for i := 0; i < len(s); {
		c := s[i]
		if c < utf8.RuneSelf {
			switch {
			case c == '"' || c == '\\':
				b = append(b, '\\', c)
			case c == '\n':
				b = append(b, '\\', 'n')
			case c == '\r':
				b = append(b, '\\', 'r')
			case c == '\t':
				b = append(b, '\\', 't')
			case c == '\b':
				b = append(b, '\\', 'b')
			case c == '\f':
				b = append(b, '\\', 'f')
			case c < 0x20 || c == '<' || c == '>' || c == '&':
				b = append(b, '\\', 'u', '0', '0', hex[c>>4], hex[c&0xf])
			default:
				b = append(b, c)
			}
			i++
			continue
		}
		r, size := utf8.DecodeRuneInString(s[i:])
		switch {
		case r == utf8.RuneError && size == 1:
			b = append(b, `\ufffd`...)
		case r == '\u2028' || r == '\u2029':
			b = append(b, '\\', 'u', '2', '0', '2', hex[r&0xf])
		default:
			b = append(b, s[i:i+size]...)
		}
		i += size
	}
	return append(b, '"')
}

func openDeadLetters(path string, limit int64) (*deadLetters, error) {
	d := &deadLetters{path: path, limit: limit}
	if err := d.open(); err != nil {
		return nil, err
	}
	return d, nil
}

func (d *deadLetters) open() error {
	f, err := os.OpenFile(d.path, os.O_WRONLY|os.O_CREATE|os.O_APPEND, 0o600)
	if err != nil {
		return fmt.Errorf("dead letters: %w", err)
	}
	st, err := f.Stat()
	if err != nil {
		f.Close()
		return fmt.Errorf("dead letters: %w", err)
	}
	d.f, d.w, d.size = f, bufio.NewWriter(f), st.Size()
	return nil
}

// rotatedPath is where a full dead-letter file goes.
func (d *deadLetters) rotatedPath() string {
	return strings.TrimSuffix(d.path, ".ndjson") + ".1.ndjson"
}

func (d *deadLetters) add(pos learner.Position, reason error, data []byte) {
	if len(data) > maxDeadPayload {
		data = data[:maxDeadPayload]
	}
	b := appendDeadLetter(d.buf[:0], pos, Plain(reason.Error()), data)
	d.buf = b
	if d.size > 0 && d.size+int64(len(b)) > d.limit {
		d.rotate()
	}
	n, _ := d.w.Write(b)
	d.size += int64(n)
	d.n.Add(1)
}

// rotate moves the full file aside and starts a new one. On failure it goes
// on writing the old file (the bound is exceeded rather than a line lost)
// and the failure is returned by the next flush.
func (d *deadLetters) rotate() {
	d.w.Flush()
	if err := os.Rename(d.path, d.rotatedPath()); err != nil {
		d.err = fmt.Errorf("dead letters: rotate: %w", err)
		return
	}
	old := d.f
	if err := d.open(); err != nil {
		os.Rename(d.rotatedPath(), d.path)
		d.err = err
		return
	}
	old.Close()
}

func (d *deadLetters) count() int64 { return d.n.Load() }

func (d *deadLetters) flush() error {
	err := d.w.Flush()
	if d.err != nil {
		err, d.err = errors.Join(err, d.err), nil
	}
	return err
}

func (d *deadLetters) Close() error {
	d.w.Flush()
	return d.f.Close()
}
