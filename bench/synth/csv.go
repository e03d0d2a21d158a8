package synth

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"encoding/json"
	"io"
)

// CSVColumns are the columns of the scenario written as CSV.
var CSVColumns = []string{"time", "key", "outdoor_c", "door_min", "shift", "target"}

// WriteCSV writes the scenario as CSV (RFC 4180, a header row): the same
// events as Write, row for line, so that both replay alike. A line of
// Write's that is not an event object (the scenario's deliberately broken
// lines) becomes a row of one field, which a reader refuses as a bad row.
func WriteCSV(w io.Writer, cfg Config) (int, error) {
	var buf bytes.Buffer
	if _, err := Write(&buf, cfg); err != nil {
		return 0, err
	}
	bw := bufio.NewWriter(w)
	cw := csv.NewWriter(bw)
	if err := cw.Write(CSVColumns); err != nil {
		return 0, err
	}
	rows := 0
	rec := make([]string, len(CSVColumns))
	for _, line := range bytes.Split(bytes.TrimSuffix(buf.Bytes(), []byte("\n")), []byte("\n")) {
		var ev struct {
			Time     json.RawMessage            `json:"time"`
			Key      json.RawMessage            `json:"key"`
			Features map[string]json.RawMessage `json:"features"`
			Target   json.RawMessage            `json:"target"`
		}
		d := json.NewDecoder(bytes.NewReader(line))
		if err := d.Decode(&ev); err != nil || d.More() {
			if err := cw.Write([]string{string(line)}); err != nil {
				return rows, err
			}
			rows++
			continue
		}
		cell := func(raw json.RawMessage) string {
			var s string
			if json.Unmarshal(raw, &s) == nil {
				return s
			}
			return string(raw)
		}
		rec[0], rec[1], rec[5] = cell(ev.Time), cell(ev.Key), cell(ev.Target)
		for i, name := range CSVColumns[2:5] {
			rec[2+i] = cell(ev.Features[name])
		}
		if err := cw.Write(rec); err != nil {
			return rows, err
		}
		rows++
	}
	cw.Flush()
	if err := cw.Error(); err != nil {
		return rows, err
	}
	return rows, bw.Flush()
}
