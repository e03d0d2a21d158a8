package intake

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"slices"
	"strings"
	"time"
	"unicode/utf8"
)

// Histories in CSV (RFC 4180, a header row): each data row becomes one
// event in the canonical shape (DESIGN.md, "Event") that the event decoder
// reads, so that a CSV history replays exactly as the same events in NDJSON
// do. The row's position is its number among the data rows, from 1 (the
// header is not counted): a scenario written in both formats has the same
// positions. A row that cannot become an event (a wrong number of fields, a
// time that does not parse, bad quoting) is reported by History.Next, at
// its row number, with an error wrapping ErrBadRow that names the file's line.

// ErrBadRow marks a history row that cannot become an event.
var ErrBadRow = errors.New("bad row")

// csvRows reads a CSV history.
type csvRows struct {
	r *csv.Reader
	shape
	row int64
}

// shape is what the columns of a tabular history are, by name, and the
// canonical event a row of cells makes (event).
type shape struct {
	f     Fields
	names []string // the columns'
	feat  []string // the features' names: the columns', renamed (Fields.Rename)
	role  []role
	out   []byte
}

// newShape names the columns and gives each its role; strings marks the
// columns whose values are text however they look (a Parquet string
// column), which are features as categorical.
func newShape(names []string, f Fields, strings []bool) (shape, error) {
	sh := shape{f: f.withDefaults()}
	seen := map[string]bool{}
	for i, name := range names {
		if name == "" || seen[name] || !utf8.ValidString(name) {
			return sh, fmt.Errorf("column %d is named %q, empty, repeated or not UTF-8", i+1, name)
		}
		seen[name] = true
		sh.names = append(sh.names, name)
		feat := name
		if to, ok := sh.f.Rename[name]; ok {
			feat = to
		}
		sh.feat = append(sh.feat, feat)
		ro := roleFeature
		switch {
		case name == sh.f.Time:
			ro = roleTime
		case name == sh.f.Key:
			ro = roleKey
		case name == sh.f.Target:
			ro = roleTarget
		case slices.Contains(sh.f.Ignore, name):
			ro = roleIgnore
		case slices.Contains(sh.f.Categorical, feat) || strings != nil && strings[i]:
			ro = roleCategorical
		case slices.Contains(sh.f.Numeric, feat):
			ro = roleNumeric
		}
		sh.role = append(sh.role, ro)
	}
	renamed := map[string]bool{}
	for i, ro := range sh.role {
		if ro == roleFeature || ro == roleCategorical || ro == roleNumeric {
			if renamed[sh.feat[i]] {
				return sh, fmt.Errorf("two columns become the feature %q", sh.feat[i])
			}
			renamed[sh.feat[i]] = true
		}
	}
	if !seen[sh.f.Target] {
		return sh, fmt.Errorf("no %q column for the target (columns: %s); name it with --target-field", sh.f.Target, joinNames(sh.names))
	}
	return sh, nil
}

func joinNames(names []string) string {
	if len(names) > 20 {
		return fmt.Sprintf("%s and %d more", joinNames(names[:20]), len(names)-20)
	}
	out := ""
	for i, n := range names {
		if i > 0 {
			out += ", "
		}
		out += n
	}
	return out
}

type role uint8

const (
	roleFeature role = iota
	roleTime
	roleKey
	roleTarget
	roleIgnore
	roleCategorical
	roleNumeric
)

// newCSVRows reads the header of a CSV history from r.
func newCSVRows(r io.Reader, f Fields) (*csvRows, error) {
	if err := f.Validate(); err != nil {
		return nil, err
	}
	c := &csvRows{r: csv.NewReader(r)}
	c.r.ReuseRecord = true
	head, err := c.r.Read()
	if err != nil {
		if err == io.EOF {
			return nil, errors.New("intake: the CSV history is empty: it needs a header row naming its columns")
		}
		return nil, fmt.Errorf("intake: CSV header: %w", err)
	}
	names := slices.Clone(head)
	if len(names) > 0 {
		names[0] = strings.TrimPrefix(names[0], "\ufeff") // a byte order mark some writers put first
	}
	if c.shape, err = newShape(names, f, nil); err != nil {
		return nil, fmt.Errorf("intake: CSV header: %w", err)
	}
	return c, nil
}

// next returns the next row as a canonical event, its number, or an error:
// io.EOF at the end, one wrapping ErrBadRow for a row that is not an event.
func (c *csvRows) next() ([]byte, int64, error) {
	rec, err := c.r.Read()
	if err == io.EOF {
		return nil, c.row, io.EOF
	}
	c.row++
	var pe *csv.ParseError
	if errors.As(err, &pe) {
		return nil, c.row, fmt.Errorf("%w: %v (line %d of the file)", ErrBadRow, pe.Err, pe.StartLine)
	}
	if err != nil {
		return nil, c.row, err
	}
	line, _ := c.r.FieldPos(0)
	out, err := c.event(rec)
	if err != nil {
		return nil, c.row, fmt.Errorf("%w: %v (line %d of the file)", ErrBadRow, err, line)
	}
	return out, c.row, nil
}

// event writes rec, a row of cells ("" for none), as a canonical JSON event.
func (c *shape) event(rec []string) ([]byte, error) {
	b := append(c.out[:0], '{')
	first := true
	sep := func() {
		if !first {
			b = append(b, ',')
		}
		first = false
	}
	var target string
	hasTarget := false
	for i, v := range rec {
		switch c.role[i] {
		case roleTime:
			if v == "" {
				continue
			}
			t, err := parseTime(v, c.f.TimeFormat, c.f.Zone)
			if err != nil {
				return nil, err
			}
			sep()
			b = append(b, `"time":"`...)
			b = t.AppendFormat(b, time.RFC3339Nano)
			b = append(b, '"')
		case roleKey:
			sep()
			b = append(b, `"key":`...)
			b = appendJSONString(b, v)
		case roleTarget:
			target, hasTarget = v, v != ""
		}
	}
	sep()
	b = append(b, `"features":{`...)
	n := 0
	for i, v := range rec {
		ro := c.role[i]
		if ro != roleFeature && ro != roleCategorical && ro != roleNumeric || v == "" {
			continue // an empty cell is a feature the row does not have
		}
		if n > 0 {
			b = append(b, ',')
		}
		n++
		b = appendJSONString(b, c.feat[i])
		b = append(b, ':')
		switch {
		case ro == roleCategorical:
			b = appendJSONString(b, v)
		case isJSONNumber(v):
			b = append(b, v...)
		case ro == roleNumeric:
			return nil, fmt.Errorf("%s: %q is not a number", c.feat[i], v)
		default:
			b = appendJSONString(b, v)
		}
	}
	b = append(b, '}')
	if hasTarget {
		b = append(b, `,"target":`...)
		if isJSONNumber(target) {
			b = append(b, target...)
		} else {
			b = appendJSONString(b, target) // refused by the decoder as not a number, with its reason
		}
	}
	b = append(b, '}')
	c.out = b
	return b, nil
}

// isJSONNumber reports whether v is a number in JSON's grammar.
func isJSONNumber(v string) bool {
	i := 0
	if i < len(v) && v[i] == '-' {
		i++
	}
	switch {
	case i < len(v) && v[i] == '0':
		i++
	case i < len(v) && v[i] >= '1' && v[i] <= '9':
		for i < len(v) && v[i] >= '0' && v[i] <= '9' {
			i++
		}
	default:
		return false
	}
	if i < len(v) && v[i] == '.' {
		i++
		d := i
		for i < len(v) && v[i] >= '0' && v[i] <= '9' {
			i++
		}
		if i == d {
			return false
		}
	}
	if i < len(v) && (v[i] == 'e' || v[i] == 'E') {
		i++
		if i < len(v) && (v[i] == '+' || v[i] == '-') {
			i++
		}
		d := i
		for i < len(v) && v[i] >= '0' && v[i] <= '9' {
			i++
		}
		if i == d {
			return false
		}
	}
	return i == len(v)
}

// appendJSONString appends s as a JSON string.
func appendJSONString(b []byte, s string) []byte {
	b = append(b, '"')
	for i := 0; i < len(s); {
		c := s[i]
		if c >= 0x20 && c != '"' && c != '\\' && c < 0x80 {
			b = append(b, c)
			i++
			continue
		}
		if c < 0x80 {
			switch c {
			case '"', '\\':
				b = append(b, '\\', c)
			case '\n':
				b = append(b, '\\', 'n')
			case '\r':
				b = append(b, '\\', 'r')
			case '\t':
				b = append(b, '\\', 't')
			default:
				b = append(b, fmt.Sprintf(`\u%04x`, c)...)
			}
			i++
			continue
		}
		r, n := utf8.DecodeRuneInString(s[i:])
		if r == utf8.RuneError && n == 1 {
			b = append(b, `\ufffd`...) // refused by the decoder, as any U+FFFD
		} else {
			b = append(b, s[i:i+n]...)
		}
		i += n
	}
	return append(b, '"')
}
