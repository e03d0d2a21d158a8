package intake

import (
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"strconv"
	"strings"
	"time"

	"github.com/parquet-go/parquet-go"
)

// Parquet histories: a file of flat columns, read row group by row group
// and row by row (a few hundred rows at a time, so that a file larger than
// memory replays in bounded memory), each row made the canonical event of
// its columns as a CSV row is (shape): the time, key and target columns by
// name, every other column a feature — numbers as numbers, text as a
// categorical. A time column is text in the time format, a number of the
// format's unit, or a TIMESTAMP column (of any unit). A null is a value the
// row does not have. Positions are row numbers from 1.

// FormatParquet is the Parquet history format.
const FormatParquet = "parquet"

// parquetRows reads a Parquet history.
type parquetRows struct {
	shape
	f      *os.File
	file   *parquet.File
	groups []parquet.RowGroup
	g      int
	rows   parquet.Rows
	buf    []parquet.Row
	n, i   int
	row    int64
	cells  []string
	kind   []colKind
	tsUnit []int64 // per column: ns per unit of a TIMESTAMP column, else 0
}

type colKind uint8

const (
	colNumber colKind = iota
	colText
	colBool
)

// openParquet opens the Parquet history at path.
func openParquet(path string, fields Fields) (*parquetRows, error) {
	if err := fields.Validate(); err != nil {
		return nil, err
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("intake: open history: %w", err)
	}
	st, err := f.Stat()
	if err != nil {
		f.Close()
		return nil, err
	}
	pf, err := parquet.OpenFile(f, st.Size())
	if err != nil {
		f.Close()
		return nil, fmt.Errorf("intake: %s is not a Parquet file: %w", path, err)
	}
	p := &parquetRows{f: f, file: pf, groups: pf.RowGroups(), buf: make([]parquet.Row, 256)}
	schema := pf.Schema()
	var names []string
	var text []bool
	for _, path := range schema.Columns() {
		if len(path) != 1 {
			f.Close()
			return nil, fmt.Errorf("intake: %s: column %s is nested; a Parquet history has flat columns", path, strings.Join(path, "."))
		}
		leaf, _ := schema.Lookup(path...)
		names = append(names, path[0])
		k, unit := colNumber, int64(0)
		lt := ""
		if t := leaf.Node.Type().LogicalType(); t != nil {
			lt = t.String()
		}
		switch {
		case strings.Contains(lt, "TIMESTAMP"):
			unit = map[bool]int64{true: 1e6}[strings.Contains(lt, "MILLIS")] + map[bool]int64{true: 1e3}[strings.Contains(lt, "MICROS")] +
				map[bool]int64{true: 1}[strings.Contains(lt, "NANOS")]
		case leaf.Node.Type().Kind() == parquet.ByteArray || leaf.Node.Type().Kind() == parquet.FixedLenByteArray:
			k = colText
		case leaf.Node.Type().Kind() == parquet.Boolean:
			k = colBool
		}
		p.kind = append(p.kind, k)
		p.tsUnit = append(p.tsUnit, unit)
		text = append(text, k == colText)
	}
	if p.shape, err = newShape(names, fields, text); err != nil {
		f.Close()
		return nil, fmt.Errorf("intake: %s: %w", path, err)
	}
	for i, name := range names {
		if name == p.shape.f.Time && p.tsUnit[i] > 0 {
			p.shape.f.TimeFormat = TimeRFC3339 // the cell is written so
		}
	}
	p.cells = make([]string, len(names))
	return p, nil
}

// next returns the next row as a canonical event (see csvRows.next).
func (p *parquetRows) next() ([]byte, int64, error) {
	for p.i >= p.n {
		if p.rows == nil {
			if p.g >= len(p.groups) {
				return nil, p.row, io.EOF
			}
			p.rows = p.groups[p.g].Rows()
			p.g++
		}
		n, err := p.rows.ReadRows(p.buf)
		p.n, p.i = n, 0
		if errors.Is(err, io.EOF) {
			p.rows.Close()
			p.rows = nil
		} else if err != nil {
			return nil, p.row, fmt.Errorf("intake: Parquet row %d: %w", p.row+1, err)
		}
	}
	r := p.buf[p.i]
	p.i++
	p.row++
	for i := range p.cells {
		p.cells[i] = ""
	}
	for _, v := range r {
		c := v.Column()
		if c < 0 || c >= len(p.cells) || v.IsNull() {
			continue
		}
		p.cells[c] = p.cell(c, v)
	}
	out, err := p.event(p.cells)
	if err != nil {
		return nil, p.row, fmt.Errorf("%w: %v", ErrBadRow, err)
	}
	return out, p.row, nil
}

// cell writes value v of column c as the text a CSV cell would hold.
func (p *parquetRows) cell(c int, v parquet.Value) string {
	if u := p.tsUnit[c]; u > 0 {
		return time.Unix(0, v.Int64()*u).UTC().Format(time.RFC3339Nano)
	}
	switch v.Kind() {
	case parquet.Boolean:
		return strconv.FormatBool(v.Boolean())
	case parquet.Int32, parquet.Int64:
		return strconv.FormatInt(v.Int64(), 10)
	case parquet.Float:
		return formatFloat(float64(v.Float()))
	case parquet.Double:
		return formatFloat(v.Double())
	default:
		return string(v.ByteArray())
	}
}

// formatFloat writes x so that it reads back as x; not finite, as a word the
// decoder refuses.
func formatFloat(x float64) string {
	switch {
	case math.IsNaN(x):
		return "NaN"
	case math.IsInf(x, 0):
		return strconv.FormatFloat(x, 'g', -1, 64) // "+Inf", "-Inf"
	}
	return strconv.FormatFloat(x, 'g', -1, 64)
}

func (p *parquetRows) close() error {
	if p.rows != nil {
		p.rows.Close()
	}
	return p.f.Close()
}
