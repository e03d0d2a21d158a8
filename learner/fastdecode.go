package learner

import (
	"bytes"
	"slices"
	"time"
)

// decodeFast decodes the canonical event shape — one flat object with
// "time", "key", "features" (numbers and plain strings), "target" and
// "answer_id", in any
// order — without reflection and without allocating beyond the feature
// names and values. It returns ok = false, having changed nothing that
// matters, whenever the input steps outside that shape (escapes, non-ASCII
// strings, other fields, nesting, duplicates, anything malformed), and the
// caller then runs the reference decoder, so both always agree
// (FuzzDecodeEvent checks it). For input it accepts, its result and its
// error are the reference decoder's.
func decodeFast(data []byte, ev *Event, needTarget bool, keys *Keys) (ok bool, err error) {
	p := fastParser{b: data}
	p.ws()
	if !p.eat('{') {
		return false, nil
	}
	// The names and strings of the event ev held before: a stream repeats
	// them, and reusing them spares an allocation per feature (the new
	// features overwrite the old ones' storage, so they are kept aside).
	var oldNames, oldStrs [16]string
	nold := 0
	for _, f := range ev.Features[:min(len(ev.Features), len(oldNames))] {
		oldNames[nold], oldStrs[nold] = f.Name, f.Str
		nold++
	}
	oldKey := ev.Key
	feats := ev.Features[:0]
	var hasTime, hasKey, hasTarget, hasFeatures, hasAnswer bool
	var timeText, key, answer []byte
	var target float64
	var targetErr error
	p.ws()
	if p.eat('}') {
		goto done
	}
	for {
		name, ok := p.member()
		if !ok {
			return false, nil
		}
		switch string(name) {
		case "time":
			if hasTime || p.null() {
				return false, nil
			}
			if timeText, ok = p.str(); !ok {
				return false, nil
			}
			hasTime = true
		case "key":
			if hasKey || p.null() {
				return false, nil
			}
			if key, ok = p.str(); !ok {
				return false, nil
			}
			hasKey = true
		case "answer_id":
			if hasAnswer || p.null() {
				return false, nil
			}
			if answer, ok = p.str(); !ok {
				return false, nil
			}
			hasAnswer = true
		case "target":
			if hasTarget || p.null() {
				return false, nil
			}
			num, ok := p.num()
			if !ok {
				return false, nil
			}
			target, targetErr = number(num)
			hasTarget = true
		case "features":
			if hasFeatures || !p.eat('{') {
				return false, nil
			}
			hasFeatures = true
			p.ws()
			if !p.eat('}') {
				for {
					fname, ok := p.member()
					if !ok {
						return false, nil
					}
					f := Feature{}
					if p.peek() == '"' {
						v, ok := p.str()
						if !ok {
							return false, nil
						}
						f.Str, f.IsStr = reuse(v, oldStrs[:nold]), true
					} else {
						num, ok := p.num()
						if !ok {
							return false, nil
						}
						v, err := number(num)
						if err != nil {
							return false, nil // the reference decoder words this one
						}
						f.Num = v
					}
					f.Name = reuse(fname, oldNames[:nold])
					feats = append(feats, f)
					p.ws()
					if p.eat('}') {
						break
					}
					if !p.eat(',') {
						return false, nil
					}
				}
			}
		default:
			return false, nil
		}
		p.ws()
		if p.eat('}') {
			break
		}
		if !p.eat(',') {
			return false, nil
		}
	}
done:
	p.ws()
	if p.i != len(p.b) || len(feats) > MaxFeatures {
		return false, nil
	}
	slices.SortFunc(feats, func(a, b Feature) int { return compareStrings(a.Name, b.Name) })
	for i, f := range feats {
		if f.Name == "" || len(f.Name) > MaxNameBytes || (i > 0 && feats[i-1].Name == f.Name) || len(f.Str) > MaxStringBytes {
			return false, nil
		}
	}
	if (needTarget && !hasTarget) || (hasTarget && targetErr != nil) || len(key) > MaxKeyBytes || len(timeText) > maxTimeTextBytes ||
		(hasAnswer && (len(answer) == 0 || len(answer) > MaxAnswerIDBytes)) {
		return false, nil
	}
	var tns int64
	if hasTime {
		var ok bool
		if tns, ok = parseTime(timeText); !ok {
			t, err := time.Parse(time.RFC3339Nano, string(timeText))
			if err != nil {
				return false, nil
			}
			tns = t.UnixNano()
		}
	}
	*ev = Event{Features: feats, Target: target}
	switch {
	case !hasKey:
	case oldKey == string(key):
		ev.Key = oldKey
	case keys != nil:
		ev.Key = keys.key(key)
	default:
		ev.Key = string(key)
	}
	if hasTime {
		ev.Time, ev.HasTime = tns, true
	}
	if hasAnswer {
		ev.AnswerID, ev.LabelOnly = string(answer), !hasFeatures
	}
	return true, nil
}

// reuse returns b as a string: one of old when it equals one (no
// allocation), else a new one.
func reuse(b []byte, old []string) string {
	for _, s := range old {
		if s == string(b) {
			return s
		}
	}
	return string(b)
}

// parseTime parses the canonical RFC 3339 forms — YYYY-MM-DDTHH:MM:SS, an
// optional fraction of 1 to 9 digits, then Z or ±HH:MM — to Unix
// nanoseconds, as time.Parse(time.RFC3339Nano) does, without its
// generality; ok is false for anything else (the caller asks time.Parse),
// and for out-of-range fields, which time.Parse refuses.
func parseTime(b []byte) (ns int64, ok bool) {
	if len(b) < 20 || b[4] != '-' || b[7] != '-' || b[10] != 'T' || b[13] != ':' || b[16] != ':' {
		return 0, false
	}
	num := func(i, n int) (int, bool) {
		v := 0
		for _, c := range b[i : i+n] {
			if c < '0' || c > '9' {
				return 0, false
			}
			v = v*10 + int(c-'0')
		}
		return v, true
	}
	year, ok1 := num(0, 4)
	month, ok2 := num(5, 2)
	day, ok3 := num(8, 2)
	hour, ok4 := num(11, 2)
	minute, ok5 := num(14, 2)
	sec, ok6 := num(17, 2)
	if !(ok1 && ok2 && ok3 && ok4 && ok5 && ok6) || month < 1 || month > 12 || day < 1 || day > daysIn(year, month) ||
		hour > 23 || minute > 59 || sec > 59 {
		return 0, false
	}
	i := 19
	frac := 0
	if b[i] == '.' {
		i++
		n := 0
		for i < len(b) && b[i] >= '0' && b[i] <= '9' {
			if n == 9 {
				return 0, false
			}
			frac = frac*10 + int(b[i]-'0')
			n++
			i++
		}
		if n == 0 {
			return 0, false
		}
		for ; n < 9; n++ {
			frac *= 10
		}
	}
	offset := 0
	switch {
	case i == len(b)-1 && b[i] == 'Z':
	case i == len(b)-6 && (b[i] == '+' || b[i] == '-') && b[i+3] == ':':
		oh, okh := num(i+1, 2)
		om, okm := num(i+4, 2)
		if !okh || !okm || oh > 23 || om > 59 {
			return 0, false
		}
		offset = (oh*60 + om) * 60
		if b[i] == '-' {
			offset = -offset
		}
	default:
		return 0, false
	}
	secs := daysFromCivil(year, month, day)*86400 + int64(hour*3600+minute*60+sec) - int64(offset)
	// time.Time's UnixNano is defined within ±292 years of 1970; the
	// canonical years 0000–9999 may reach past it: let time.Parse decide.
	if secs < -9_000_000_000 || secs > 9_000_000_000 {
		return 0, false
	}
	return secs*1e9 + int64(frac), true
}

func daysIn(year, month int) int {
	switch month {
	case 2:
		if year%4 == 0 && (year%100 != 0 || year%400 == 0) {
			return 29
		}
		return 28
	case 4, 6, 9, 11:
		return 30
	}
	return 31
}

// daysFromCivil is the number of days from 1970-01-01 to the given date of
// the proleptic Gregorian calendar (H. Hinnant, "chrono-Compatible Low-Level
// Date Algorithms", days_from_civil).
func daysFromCivil(y, m, d int) int64 {
	if m <= 2 {
		y--
	}
	era := y / 400
	if y < 0 && y%400 != 0 {
		era = (y - 399) / 400
	}
	yoe := y - era*400
	mp := (m + 9) % 12
	doy := (153*mp+2)/5 + d - 1
	doe := yoe*365 + yoe/4 - yoe/100 + doy
	return int64(era)*146097 + int64(doe) - 719468
}

func compareStrings(a, b string) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}

type fastParser struct {
	b []byte
	i int
}

func (p *fastParser) ws() {
	for p.i < len(p.b) {
		switch p.b[p.i] {
		case ' ', '\t', '\n', '\r':
			p.i++
		default:
			return
		}
	}
}

func (p *fastParser) peek() byte {
	if p.i < len(p.b) {
		return p.b[p.i]
	}
	return 0
}

func (p *fastParser) eat(c byte) bool {
	if p.i < len(p.b) && p.b[p.i] == c {
		p.i++
		return true
	}
	return false
}

func (p *fastParser) null() bool { return bytes.HasPrefix(p.b[p.i:], []byte("null")) }

// member reads an object member's name and the colon after it, with the
// whitespace around them, leaving the parser at the value.
func (p *fastParser) member() ([]byte, bool) {
	p.ws()
	name, ok := p.str()
	if !ok {
		return nil, false
	}
	p.ws()
	if !p.eat(':') {
		return nil, false
	}
	p.ws()
	return name, true
}

// str reads a string of printable ASCII without escapes.
func (p *fastParser) str() ([]byte, bool) {
	if !p.eat('"') {
		return nil, false
	}
	start := p.i
	for p.i < len(p.b) {
		c := p.b[p.i]
		switch {
		case c == '"':
			s := p.b[start:p.i]
			p.i++
			return s, true
		case c == '\\' || c < 0x20 || c >= 0x80:
			return nil, false
		}
		p.i++
	}
	return nil, false
}

// num reads a JSON number's bytes (validated by the JSON grammar).
func (p *fastParser) num() ([]byte, bool) {
	start := p.i
	p.eat('-')
	if p.eat('0') {
	} else if d := p.digits(); d == 0 {
		return nil, false
	}
	if p.eat('.') && p.digits() == 0 {
		return nil, false
	}
	if c := p.peek(); c == 'e' || c == 'E' {
		p.i++
		if c := p.peek(); c == '+' || c == '-' {
			p.i++
		}
		if p.digits() == 0 {
			return nil, false
		}
	}
	return p.b[start:p.i], true
}

func (p *fastParser) digits() int {
	n := 0
	for p.i < len(p.b) && p.b[p.i] >= '0' && p.b[p.i] <= '9' {
		p.i++
		n++
	}
	return n
}
