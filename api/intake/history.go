package intake

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"

	"github.com/klauspost/compress/zstd"
)

// MaxLineBytes bounds one line of a history file; a longer line is skipped
// (reported by Next as too long) without being held in memory.
const MaxLineBytes = 1 << 20

// ErrLineTooLong marks a line past MaxLineBytes.
var ErrLineTooLong = errors.New("intake: line too long")

// History reads a history file of one JSON event per line (NDJSON). A name
// ending in .gz is read through gzip, .zst through zstd; anything else is
// read as is. Positions are line numbers, counted from 1, in partition 0.
//
// Not safe for concurrent use.
type History struct {
	rows *csvRows     // a CSV history's rows, as canonical events; nil for NDJSON
	pq   *parquetRows // a Parquet history's
	jm   *Mapper      // an NDJSON history's mapping, when it has one
	f    *os.File
	dec  io.Closer
	r    *bufio.Reader
	cnt  *countingReader
	buf  []byte
	line int64
	size int64
}

type countingReader struct {
	r io.Reader
	n int64
}

func (c *countingReader) Read(p []byte) (int, error) {
	n, err := c.r.Read(p)
	c.n += int64(n)
	return n, err
}

// History formats.
const (
	FormatNDJSON = "ndjson"
	FormatCSV    = "csv"
)

// FormatOf returns the format a history's name says: csv for .csv (also
// .csv.gz, .csv.zst), parquet for .parquet, else ndjson.
func FormatOf(path string) string {
	p := strings.ToLower(strings.TrimSuffix(strings.TrimSuffix(path, ".gz"), ".zst"))
	switch {
	case strings.HasSuffix(p, ".csv"):
		return FormatCSV
	case strings.HasSuffix(p, ".parquet"):
		return FormatParquet
	}
	return FormatNDJSON
}

// OpenHistory opens the history file at path, in the format its name says
// (FormatOf), with the default fields.
func OpenHistory(path string) (*History, error) {
	return OpenHistoryAs(path, FormatOf(path), Fields{})
}

// OpenHistoryAs opens the history file at path in format (FormatNDJSON or
// FormatCSV); fields names a CSV history's time, key and target columns and
// says how its time is written.
func OpenHistoryAs(path, format string, fields Fields) (*History, error) {
	switch format {
	case FormatNDJSON, FormatCSV:
	case FormatParquet:
		pq, err := openParquet(path, fields)
		if err != nil {
			return nil, err
		}
		h := &History{pq: pq, cnt: &countingReader{}}
		if st, err := os.Stat(path); err == nil {
			h.size = st.Size()
		}
		return h, nil
	default:
		return nil, fmt.Errorf("intake: history format %q: want ndjson, csv or parquet", format)
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("intake: open history: %w", err)
	}
	st, err := f.Stat()
	if err != nil {
		f.Close()
		return nil, fmt.Errorf("intake: open history: %w", err)
	}
	h := &History{f: f, size: st.Size(), cnt: &countingReader{r: f}}
	var src io.Reader = h.cnt
	switch {
	case strings.HasSuffix(path, ".gz"):
		g, err := gzip.NewReader(src)
		if err != nil {
			f.Close()
			return nil, fmt.Errorf("intake: %s: %w", path, err)
		}
		src, h.dec = g, g
	case strings.HasSuffix(path, ".zst"):
		z, err := zstd.NewReader(src, zstd.WithDecoderConcurrency(1))
		if err != nil {
			f.Close()
			return nil, fmt.Errorf("intake: %s: %w", path, err)
		}
		src, h.dec = z, z.IOReadCloser()
	}
	h.r = bufio.NewReaderSize(src, 64<<10)
	if format == FormatCSV {
		rows, err := newCSVRows(h.r, fields)
		if err != nil {
			h.Close()
			return nil, fmt.Errorf("%s: %w", path, err)
		}
		h.rows = rows
	} else if fields.Mapped() {
		if h.jm, err = NewMapper(fields); err != nil {
			h.Close()
			return nil, err
		}
	}
	return h, nil
}

// NewCSVHistoryReader reads a CSV history (not compressed) from r.
func NewCSVHistoryReader(r io.Reader, fields Fields) (*History, error) {
	h := NewHistoryReader(r)
	rows, err := newCSVRows(h.r, fields)
	if err != nil {
		return nil, err
	}
	h.rows = rows
	return h, nil
}

// NewHistoryReader reads NDJSON from r (not compressed); Size reports 0.
func NewHistoryReader(r io.Reader) *History {
	h := &History{cnt: &countingReader{r: r}}
	h.r = bufio.NewReaderSize(h.cnt, 64<<10)
	return h
}

// Next returns the next line without its newline and its number. The slice
// is valid until the next call. A line past MaxLineBytes is consumed and
// reported with an error wrapping ErrLineTooLong; the end of the input is
// io.EOF. A final line without a newline is returned as a line.
//
// A CSV history returns each data row as a canonical JSON event, numbered
// from 1, and a row that cannot be one as an error wrapping ErrBadRow.
func (h *History) Next() ([]byte, int64, error) {
	if h.rows != nil {
		return h.rows.next()
	}
	if h.pq != nil {
		return h.pq.next()
	}
	h.buf = h.buf[:0]
	tooLong := false
	for {
		chunk, err := h.r.ReadSlice('\n')
		if len(h.buf)+len(chunk) > MaxLineBytes+1 {
			tooLong = true
		} else {
			h.buf = append(h.buf, chunk...)
		}
		switch {
		case err == bufio.ErrBufferFull:
			continue
		case err == io.EOF:
			if len(h.buf) == 0 && !tooLong {
				return nil, h.line, io.EOF
			}
		case err != nil:
			return nil, h.line, fmt.Errorf("intake: history line %d: %w", h.line+1, err)
		}
		h.line++
		if tooLong {
			return nil, h.line, fmt.Errorf("%w: line %d is longer than %d bytes", ErrLineTooLong, h.line, MaxLineBytes)
		}
		line := trimNewline(h.buf)
		if h.jm != nil && len(bytes.TrimSpace(line)) > 0 {
			out, err := h.jm.Canonical(line)
			if err != nil {
				return nil, h.line, fmt.Errorf("%w: %v", ErrBadRow, err)
			}
			return out, h.line, nil
		}
		return line, h.line, nil
	}
}

func trimNewline(b []byte) []byte {
	if n := len(b); n > 0 && b[n-1] == '\n' {
		b = b[:n-1]
		if n := len(b); n > 0 && b[n-1] == '\r' {
			b = b[:n-1]
		}
	}
	return b
}

// Unit names a position of the history in messages: "row" for CSV, else "line".
func (h *History) Unit() string {
	if h.rows != nil || h.pq != nil {
		return "row"
	}
	return "line"
}

// BytesRead returns the bytes read from the file so far (compressed bytes
// for a compressed file), and Size the file's size, for progress reports.
func (h *History) BytesRead() int64 { return h.cnt.n }

// Size returns the file's size in bytes (0 when unknown).
func (h *History) Size() int64 { return h.size }

// Close closes the file.
func (h *History) Close() error {
	if h.pq != nil {
		return h.pq.close()
	}
	if h.dec != nil {
		h.dec.Close()
	}
	if h.f != nil {
		return h.f.Close()
	}
	return nil
}
