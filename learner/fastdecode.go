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
func decodeFast(data []byte, ev *Event, needTarget bool) (ok bool, err error) {
	p := fastParser{b: data}
	p.ws()
	if !p.eat('{') {
		return false, nil
	}
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
						f.Str, f.IsStr = string(v), true
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
					f.Name = string(fname)
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
	var t time.Time
	if hasTime {
		var err error
		if t, err = time.Parse(time.RFC3339Nano, string(timeText)); err != nil {
			return false, nil
		}
	}
	*ev = Event{Features: feats, Target: target}
	if hasKey {
		ev.Key = string(key)
	}
	if hasTime {
		ev.Time, ev.HasTime = t.UnixNano(), true
	}
	if hasAnswer {
		ev.AnswerID, ev.LabelOnly = string(answer), !hasFeatures
	}
	return true, nil
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
