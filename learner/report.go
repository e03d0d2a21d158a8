package learner

import "time"

// Report is a snapshot of every learner's prequential metrics; it is the
// object `tidemark replay --json` prints and GET /v1/learners serves.
type Report struct {
	Events          int64 `json:"events"` // events applied (trained on)
	Rejected        int64 `json:"rejected"`
	Duplicates      int64 `json:"duplicates"`
	Skipped         int64 `json:"skipped"` // passed over by a restore that skipped a range
	IgnoredFeatures int64 `json:"ignored_features"`
	Keys            int   `json:"keys"`
	// StateBytes estimates the bytes the model state holds (windows,
	// coefficients, scorers): what Config.MemoryBudget is held to.
	StateBytes   int64           `json:"state_bytes"`
	RecentWindow int             `json:"recent_window"` // scored events per key in the "recent" metrics
	Positions    []Position      `json:"positions"`
	Learners     []LearnerReport `json:"learners"`
	// Leader is the per-key leader's figures, when the engine keeps one.
	Leader *LeaderReport `json:"leader,omitempty"`
	// Served scores the answers a service gave against their labels, once
	// any was served (served.go).
	Served *ServedReport `json:"served,omitempty"`
}

// LearnerReport is one learner's metrics, overall and (optionally) per key.
type LearnerReport struct {
	Name string `json:"name"`
	Spec string `json:"spec"`
	Kind string `json:"kind"`
	Metrics
	// Skill is 1 − rmse/rmse_baseline against the first mean learner
	// configured; nil without one or before both have scored.
	Skill *float64    `json:"skill"`
	Drift DriftReport `json:"drift"`
	// Late counts the events that were already older than this learner's
	// time window on arrival: scored, but not stored (0 without a time window).
	Late int64 `json:"late"`
	// StateBytes estimates the bytes this learner holds over all keys
	// (model, scorer, drift detector; see Report.StateBytes).
	StateBytes int64       `json:"state_bytes"`
	Keys       []KeyReport `json:"keys,omitempty"`
}

// lateCounter is implemented by learners with a time window.
type lateCounter interface{ Late() int64 }

// KeyReport is a learner's metrics on one key.
type KeyReport struct {
	Key string `json:"key"`
	Metrics
	Skill *float64 `json:"skill"`
	Drift string   `json:"drift"`
}

// DriftReport is a learner's drift watch: the most severe state over its
// keys, the number of alarms and where the last fired.
type DriftReport struct {
	State     string       `json:"state"`
	Alarms    int64        `json:"alarms"`
	LastAlarm *AlarmReport `json:"last_alarm"`
}

// AlarmReport locates an alarm.
type AlarmReport struct {
	Position Position `json:"position"`
	Key      string   `json:"key"`
	Time     string   `json:"time,omitempty"`
}

// Report builds the report from the running totals, in time independent of
// the number of keys; withKeys adds per-key metrics (a visit of every key).
func (e *Engine) Report(withKeys bool) Report {
	return e.report(withKeys, e.numKeys(), e.Positions(), e.servedTotals())
}

func (e *Engine) report(withKeys bool, numKeys int, positions []Position, served *ServedTotals) Report {
	r := Report{Events: e.applied, Rejected: e.rejected, Duplicates: e.duplicates, Skipped: e.skipped, IgnoredFeatures: e.ignored,
		Keys: numKeys, StateBytes: e.StateBytes(), RecentWindow: e.cfg.Score.Recent, Positions: positions, Served: served.report(&e.cfg)}
	var keys []*keyState
	if withKeys {
		// Keys by name alone, not by partition.
		keys = e.ordered()
	}
	for i := range e.cfg.Learners {
		s := &e.cfg.Learners[i]
		t := &e.totals[i]
		lr := LearnerReport{Name: s.Name, Spec: s.Text, Kind: s.Kind.String(), Metrics: t.pool.metrics(), Late: t.late, StateBytes: t.held}
		if e.baseline >= 0 {
			lr.Skill = Skill(lr.Metrics, e.totals[e.baseline].pool.metrics())
		}
		state := Stable
		for st, n := range t.states {
			if n > 0 {
				state = DriftState(st)
			}
		}
		for _, ks := range keys {
			kr := KeyReport{Key: ks.key, Metrics: ks.slots[i].score.Metrics(), Drift: ks.slots[i].drift.State().String()}
			kr.Conformal.Level = e.cfg.Score.Level
			if e.baseline >= 0 {
				kr.Skill = Skill(kr.Metrics, ks.slots[e.baseline].score.Metrics())
			}
			lr.Keys = append(lr.Keys, kr)
		}
		lr.Drift = DriftReport{State: state.String(), Alarms: t.alarms}
		if a := t.lastAlarm; a != nil {
			lr.Drift.LastAlarm = &AlarmReport{Position: a.Position, Key: a.Key}
			if a.Time != 0 {
				lr.Drift.LastAlarm.Time = time.Unix(0, a.Time).UTC().Format(time.RFC3339Nano)
			}
		}
		r.Learners = append(r.Learners, lr)
	}
	if e.cfg.Leader.On {
		m := e.lead.pool.metrics()
		r.Leader = &LeaderReport{Metrics: m, Margin: e.cfg.Leader.Margin, Switches: e.lead.switches}
	}
	return r
}

// Skill is 1 − rmse/rmse_baseline, or nil when either has no score or the
// baseline's error is zero.
func Skill(m, b Metrics) *float64 {
	if m.RMSE == nil || b.RMSE == nil || *b.RMSE == 0 {
		return nil
	}
	return ptr(1 - *m.RMSE / *b.RMSE)
}
