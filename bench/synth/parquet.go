package synth

import (
	"bytes"
	"encoding/json"
	"io"
	"strconv"

	"github.com/parquet-go/parquet-go"
)

// ParquetRow is a row of the scenario written as Parquet (WriteParquet).
type ParquetRow struct {
	Time     string   `parquet:"time"`
	Key      string   `parquet:"key"`
	OutdoorC *float64 `parquet:"outdoor_c,optional"`
	DoorMin  *int64   `parquet:"door_min,optional"`
	Shift    *string  `parquet:"shift,optional"`
	Target   *float64 `parquet:"target,optional"`
}

// WriteParquet writes the scenario as Parquet with parquet-go's writer: the
// same events as Write, row for line. A line of Write's that is not an event
// leaves what it lacks null (a row without a target, which a reader
// refuses), a target that is not a number is null, and 1e999 is +Inf: each
// broken line is a refused row at the same position.
func WriteParquet(w io.Writer, cfg Config) (int, error) {
	var buf bytes.Buffer
	if _, err := Write(&buf, cfg); err != nil {
		return 0, err
	}
	pw := parquet.NewGenericWriter[ParquetRow](w)
	rows := make([]ParquetRow, 0, 1024)
	n := 0
	flush := func() error {
		if _, err := pw.Write(rows); err != nil {
			return err
		}
		n += len(rows)
		rows = rows[:0]
		return nil
	}
	for _, line := range bytes.Split(bytes.TrimSuffix(buf.Bytes(), []byte("\n")), []byte("\n")) {
		var ev struct {
			Time     string                     `json:"time"`
			Key      string                     `json:"key"`
			Features map[string]json.RawMessage `json:"features"`
			Target   json.RawMessage            `json:"target"`
		}
		var r ParquetRow
		d := json.NewDecoder(bytes.NewReader(line))
		if d.Decode(&ev) == nil && !d.More() {
			r.Time, r.Key = ev.Time, ev.Key
			if v, ok := ev.Features["outdoor_c"]; ok {
				f, _ := strconv.ParseFloat(string(v), 64) // 1e999: +Inf
				r.OutdoorC = &f
			}
			if v, ok := ev.Features["door_min"]; ok {
				i, _ := strconv.ParseInt(string(v), 10, 64)
				r.DoorMin = &i
			}
			var shift string
			if json.Unmarshal(ev.Features["shift"], &shift) == nil {
				r.Shift = &shift
			}
			if f, err := strconv.ParseFloat(string(ev.Target), 64); err == nil {
				r.Target = &f
			}
		}
		rows = append(rows, r)
		if len(rows) == cap(rows) {
			if err := flush(); err != nil {
				return n, err
			}
		}
	}
	if err := flush(); err != nil {
		return n, err
	}
	return n, pw.Close()
}
