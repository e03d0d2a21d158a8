package learner

import "fmt"

// RejectKind says why the engine refuses a well-formed event.
type RejectKind int

// Reject kinds.
const (
	// RejectSchema: a schema feature is missing or of the wrong type.
	RejectSchema RejectKind = iota + 1
	// RejectTime: the event has no time and a learner or the time features need one.
	RejectTime
	// RejectKeyCap: the event's key would be new, past the cap on keys.
	RejectKeyCap
	// RejectMemory: the event's key would be new and the state is at its
	// memory budget.
	RejectMemory
)

func (k RejectKind) String() string {
	switch k {
	case RejectSchema:
		return "schema"
	case RejectTime:
		return "time"
	case RejectKeyCap:
		return "key_cap"
	case RejectMemory:
		return "memory_budget"
	}
	return fmt.Sprintf("RejectKind(%d)", int(k))
}

// Rejection is the error for an event the engine refuses; it wraps
// ErrRejected and says which kind of refusal it is.
type Rejection struct {
	Kind RejectKind
	msg  string
}

func (r *Rejection) Error() string { return ErrRejected.Error() + ": " + r.msg }

// Unwrap returns ErrRejected.
func (r *Rejection) Unwrap() error { return ErrRejected }

func reject(kind RejectKind, format string, args ...any) error {
	return &Rejection{Kind: kind, msg: fmt.Sprintf(format, args...)}
}

// Validator checks events as Apply would refuse them — schema, time, key cap
// — without changing the engine, so that an intake can refuse them before
// acknowledging. It remembers the schema and the new keys of the events it
// passed, so that a batch is checked as the engine will apply it in order.
// The engine must not change while a Validator is in use (give it a
// published copy); several Validators may share one engine. The engine
// remains the authority: an event another writer makes invalid in between
// is still refused when applied.
//
// Not safe for concurrent use.
type Validator struct {
	e       *Engine
	schema  *Schema
	newKeys map[string]bool
	x       []float64
}

// NewValidator returns a Validator over e.
func (e *Engine) NewValidator() *Validator {
	return &Validator{e: e, schema: e.schema, newKeys: map[string]bool{}}
}

// Check returns the error Apply would return for ev (a *Rejection), or nil;
// ev must have passed DecodeEvent or ValidateEvent. A passed event counts
// towards the schema and the key cap of the events checked after it.
func (v *Validator) Check(ev *Event) error {
	if ev.LabelOnly {
		return nil // labels an answer; trains nothing (served.go)
	}
	schema := v.schema
	if schema == nil {
		schema = SchemaOf(ev, v.e.cfg.Features)
	}
	if len(v.x) != schema.Dim() {
		v.x = make([]float64, schema.Dim())
	}
	if _, err := schema.Vector(v.x, ev); err != nil {
		return err
	}
	if v.e.needTime != "" && !ev.HasTime {
		return reject(RejectTime, "time is missing and %s needs it", v.e.needTime)
	}
	if v.e.lookup(ev.Key) == nil && !v.newKeys[ev.Key] {
		if n := v.e.numKeys() + len(v.newKeys); n >= v.e.cfg.MaxKeys {
			return reject(RejectKeyCap, "key %q would be key number %d, past the cap of %d", truncate(ev.Key), n+1, v.e.cfg.MaxKeys)
		}
		if err := v.e.overBudget(ev.Key); err != nil {
			return err
		}
		v.newKeys[ev.Key] = true
	}
	v.schema = schema
	return nil
}
