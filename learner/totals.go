package learner

import (
	"fmt"
	"slices"

	"tidemark/window"
)

// Totals are an engine's running totals — counters, pooled scorers, drift
// counts, alarms — in a form that crosses a process boundary (JSON) and adds
// up exactly: engines holding disjoint partitions of one stream (the
// instances of a consumer group) sum their Totals, and the report of the sum
// (Config.ReportOf) is, to the bit, the report of one engine that applied
// every event, since the float sums are exact (window.Exact) and rounded only
// when a report is made.
type Totals struct {
	Config     string          `json:"config_sha256"` // Config.Digest: only totals of one configuration add up
	Applied    int64           `json:"events"`
	Rejected   int64           `json:"rejected"`
	Duplicates int64           `json:"duplicates"`
	Skipped    int64           `json:"skipped"`
	Ignored    int64           `json:"ignored_features"`
	Keys       int64           `json:"keys"`
	KeyBytes   int64           `json:"key_bytes"`
	Positions  []Position      `json:"positions"`
	Learners   []LearnerTotals `json:"learners"`
	Leader     *LearnerTotals  `json:"leader,omitempty"` // the keys' leaders, when kept (Switches in Alarms)
	Served     *ServedTotals   `json:"served,omitempty"` // the served answers' scores, once any was served
}

// LearnerTotals are one learner's totals over an engine's keys.
type LearnerTotals struct {
	Alpha     float64                `json:"alpha"`
	Scored    int64                  `json:"scored"`
	Unscored  int64                  `json:"unscored"`
	RecentN   int64                  `json:"recent_n"`
	Intervals int64                  `json:"intervals"`
	Covered   int64                  `json:"covered"`
	CqCovered int64                  `json:"conformal_covered"`
	Sums      [poolSums]window.Exact `json:"sums"`
	States    [Drift + 1]int64       `json:"states"`
	Late      int64                  `json:"late"`
	Held      int64                  `json:"held"`
	Alarms    int64                  `json:"alarms"`
	LastAlarm *Alarm                 `json:"last_alarm,omitempty"`
	LastTime  int64                  `json:"last_alarm_time,omitempty"` // the last alarm's event time, Unix ns (Alarm.Time)
}

// Totals returns the engine's totals.
func (e *Engine) Totals() Totals {
	t := Totals{Config: e.cfg.Digest(), Applied: e.applied, Rejected: e.rejected, Duplicates: e.duplicates, Skipped: e.skipped,
		Ignored: e.ignored, Keys: int64(e.numKeys()), KeyBytes: e.keyBase, Positions: e.Positions(), Served: e.servedTotals()}
	for i := range e.totals {
		s := &e.totals[i]
		lt := s.pool.totals()
		lt.States, lt.Late, lt.Held, lt.Alarms = s.states, s.late, s.held, s.alarms
		if a := s.lastAlarm; a != nil {
			c := *a
			lt.LastAlarm, lt.LastTime = &c, a.Time
		}
		t.Learners = append(t.Learners, lt)
	}
	if e.cfg.Leader.On {
		lt := e.lead.pool.totals()
		lt.Alarms = e.lead.switches
		t.Leader = &lt
	}
	return t
}

// totals is the pool as LearnerTotals carry it.
func (p *pool) totals() LearnerTotals {
	return LearnerTotals{Alpha: p.alpha, Scored: p.scored, Unscored: p.unscored, RecentN: p.recN,
		Intervals: p.intervals, Covered: p.covered, CqCovered: p.cqCovered, Sums: p.sums}
}

// pool is the pool lt carries, at the intervals' level.
func (lt *LearnerTotals) pool(level float64) pool {
	return pool{alpha: lt.Alpha, level: level, scored: lt.Scored, unscored: lt.Unscored, recN: lt.RecentN,
		intervals: lt.Intervals, covered: lt.Covered, cqCovered: lt.CqCovered, sums: lt.Sums}
}

// Add adds o, the totals of an engine holding other partitions, to t.
func (t *Totals) Add(o Totals) error {
	if t.Config != o.Config || len(t.Learners) != len(o.Learners) {
		return fmt.Errorf("%w: totals of other learners or settings cannot be added", ErrInvalidSpec)
	}
	for _, p := range o.Positions {
		if slices.ContainsFunc(t.Positions, func(q Position) bool { return q.Partition == p.Partition }) {
			return fmt.Errorf("learner: partition %d is in both totals", p.Partition)
		}
	}
	if (t.Leader == nil) != (o.Leader == nil) {
		return fmt.Errorf("%w: totals with and without a leader cannot be added", ErrInvalidSpec)
	}
	if t.Served != nil && o.Served != nil && len(t.Served.Rows) != len(o.Served.Rows) {
		return fmt.Errorf("%w: served totals of other learners cannot be added", ErrInvalidSpec)
	}
	t.Applied += o.Applied
	t.Rejected += o.Rejected
	t.Duplicates += o.Duplicates
	t.Skipped += o.Skipped
	t.Ignored += o.Ignored
	t.Keys += o.Keys
	t.KeyBytes += o.KeyBytes
	t.Positions = append(t.Positions, o.Positions...)
	slices.SortFunc(t.Positions, func(a, b Position) int { return int(a.Partition - b.Partition) })
	if t.Leader != nil {
		t.Leader.addScores(o.Leader) // the leader's switches ride in Alarms
	}
	switch {
	case o.Served == nil:
	case t.Served == nil:
		c := *o.Served
		c.Rows = slices.Clone(o.Served.Rows)
		t.Served = &c
	default:
		t.Served.add(o.Served)
	}
	for i := range t.Learners {
		a, b := &t.Learners[i], &o.Learners[i]
		a.addScores(b)
		for j := range a.States {
			a.States[j] += b.States[j]
		}
		a.Late += b.Late
		a.Held += b.Held
		if b.LastAlarm != nil {
			x := *b.LastAlarm
			x.Time = b.LastTime
			if a.LastAlarm != nil {
				a.LastAlarm.Time = a.LastTime
			}
			a.LastAlarm = laterAlarm(a.LastAlarm, x)
			a.LastTime = a.LastAlarm.Time
		}
	}
	return nil
}

// addScores adds b's pooled scores and alarm count to a.
func (a *LearnerTotals) addScores(b *LearnerTotals) {
	if a.Scored+a.Unscored == 0 {
		a.Alpha = b.Alpha
	}
	a.Scored += b.Scored
	a.Unscored += b.Unscored
	a.RecentN += b.RecentN
	a.Intervals += b.Intervals
	a.Covered += b.Covered
	a.CqCovered += b.CqCovered
	a.Alarms += b.Alarms
	for j := range a.Sums {
		a.Sums[j].AddExact(&b.Sums[j])
	}
}

// ReportOf makes the report of totals t, taken under c, without per-key
// figures: what Engine.Report(false) gives for the engine t came from.
func (c Config) ReportOf(t Totals) (Report, error) {
	if t.Config != c.Digest() || len(t.Learners) != len(c.Learners) {
		return Report{}, fmt.Errorf("%w: the totals were taken under another configuration", ErrInvalidSpec)
	}
	e, err := NewEngine(c)
	if err != nil {
		return Report{}, err
	}
	e.applied, e.rejected, e.duplicates, e.skipped, e.ignored, e.keyBase = t.Applied, t.Rejected, t.Duplicates, t.Skipped, t.Ignored, t.KeyBytes
	for i, lt := range t.Learners {
		s := &e.totals[i]
		s.pool = lt.pool(e.cfg.Score.Level)
		s.states, s.late, s.held, s.alarms = lt.States, lt.Late, lt.Held, lt.Alarms
		if lt.LastAlarm != nil {
			a := *lt.LastAlarm
			a.Time = lt.LastTime
			s.lastAlarm = &a
		}
	}
	if lt := t.Leader; lt != nil && c.Leader.On {
		e.lead = leadTotals{pool: lt.pool(e.cfg.Score.Level), switches: lt.Alarms}
	}
	if t.Served != nil && len(t.Served.Rows) != len(c.Learners)+1 {
		return Report{}, fmt.Errorf("%w: the served totals were taken under another configuration", ErrInvalidSpec)
	}
	return e.report(false, int(t.Keys), t.Positions, t.Served), nil
}
