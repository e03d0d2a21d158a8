package learner

import (
	"fmt"
	"strconv"
	"strings"
)

// MaxSweep is the most learners one swept spec may expand to.
const MaxSweep = 1000

// ExpandSpec parses a spec that may sweep parameters and returns one Spec
// per combination. A value LO..HI is the inclusive integer range LO to HI;
// A|B|C lists alternatives; the sweep is the cartesian product over the
// parameters, in the order written, the last parameter varying fastest.
// Each member is named by its expanded spec, e.g. knn:k=7,window=2000. A
// spec without a sweep expands to itself. Errors wrap ErrInvalidSpec: a
// malformed range, a range or product past MaxSweep members, or name= in a
// sweep (every member needs its own name).
func ExpandSpec(text string) ([]Spec, error) {
	text = strings.TrimSpace(text)
	kind, params, hasParams := strings.Cut(text, ":")
	if !hasParams || !strings.ContainsAny(params, "|") && !strings.Contains(params, "..") {
		s, err := ParseSpec(text)
		if err != nil {
			return nil, err
		}
		return []Spec{s}, nil
	}
	type param struct {
		key    string
		values []string
	}
	var ps []param
	total := 1
	for _, kv := range strings.Split(params, ",") {
		key, val, ok := strings.Cut(kv, "=")
		key, val = strings.TrimSpace(key), strings.TrimSpace(val)
		if !ok {
			return nil, fmt.Errorf("%w: spec %q: %q is not PARAM=VALUE", ErrInvalidSpec, text, kv)
		}
		if key == "name" {
			return nil, fmt.Errorf("%w: spec %q: name= cannot be given to a sweep; each member is named by its expanded spec", ErrInvalidSpec, text)
		}
		values, err := sweepValues(key, val)
		if err != nil {
			return nil, fmt.Errorf("%w: spec %q: %v", ErrInvalidSpec, text, err)
		}
		total *= len(values)
		if total > MaxSweep {
			return nil, fmt.Errorf("%w: spec %q sweeps more than %d learners; narrow a range or drop alternatives", ErrInvalidSpec, text, MaxSweep)
		}
		ps = append(ps, param{key, values})
	}
	out := make([]Spec, 0, total)
	idx := make([]int, len(ps))
	for {
		parts := make([]string, len(ps))
		for i, p := range ps {
			parts[i] = p.key + "=" + p.values[idx[i]]
		}
		s, err := ParseSpec(kind + ":" + strings.Join(parts, ","))
		if err != nil {
			return nil, err
		}
		out = append(out, s)
		i := len(ps) - 1
		for ; i >= 0; i-- {
			if idx[i]++; idx[i] < len(ps[i].values) {
				break
			}
			idx[i] = 0
		}
		if i < 0 {
			return out, nil
		}
	}
}

func sweepValues(key, val string) ([]string, error) {
	if lo, hi, ok := strings.Cut(val, ".."); ok {
		a, err1 := strconv.Atoi(strings.TrimSpace(lo))
		b, err2 := strconv.Atoi(strings.TrimSpace(hi))
		if err1 != nil || err2 != nil {
			return nil, fmt.Errorf("%s=%s: a range is LO..HI with integers, e.g. k=1..30", key, val)
		}
		if a > b {
			return nil, fmt.Errorf("%s=%s: the range is empty (%d > %d)", key, val, a, b)
		}
		if b-a >= MaxSweep {
			return nil, fmt.Errorf("%s=%s: more than %d values", key, val, MaxSweep)
		}
		var out []string
		for v := a; v <= b; v++ {
			out = append(out, strconv.Itoa(v))
		}
		return out, nil
	}
	out := strings.Split(val, "|")
	for i, v := range out {
		out[i] = strings.TrimSpace(v)
		if out[i] == "" {
			return nil, fmt.Errorf("%s=%s: an empty alternative", key, val)
		}
	}
	return out, nil
}
