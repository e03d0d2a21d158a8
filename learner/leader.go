package learner

import "math"

// DefaultLeaderMargin is the leader's hysteresis (LeaderConfig.Margin).
const DefaultLeaderMargin = 0.05

// LeaderName is what a predict names to ask a key's leader.
const LeaderName = "leader"

// LeaderConfig configures the per-key leader: for each key, the learner
// with the lowest recent RMSE, which a predict may ask for instead of naming
// a learner. The rule, applied after each event of the key (so that the
// leader for an event is chosen before its target is seen): among the
// learners with at least MinIntervalEvents recent errors on the key, the
// one with the lowest recent RMSE (the first configured on a tie) becomes
// the leader when there is none yet, and replaces the leader only when its
// recent RMSE is below (1 − Margin) × the leader's — hysteresis, so that two
// learners of nearly equal error do not take turns. The answers the leader
// gave are scored prequentially like a learner's own, and its switches are
// counted.
type LeaderConfig struct {
	On     bool
	Margin float64 // in (0, 1). Default: DefaultLeaderMargin.
}

func (c LeaderConfig) withDefaults() LeaderConfig {
	if c.Margin <= 0 || c.Margin >= 1 {
		c.Margin = DefaultLeaderMargin
	}
	return c
}

// leader is a key's leader: the learner chosen for its next event, the
// switches so far, and the score of the answers the leader gave.
type leader struct {
	current  int32 // learner index; −1 before any learner qualifies
	switches int64
	score    Scorer
}

func (l *leader) clone() *leader {
	if l == nil {
		return nil
	}
	c := *l
	c.score = l.score.clone()
	return &c
}

// LeaderReport is the leader's prequential figures over all keys: the
// answers it gave, as if it were a learner of its own, and its switches.
type LeaderReport struct {
	Metrics
	Margin   float64 `json:"margin"`
	Switches int64   `json:"switches"`
}

// leadTotals is what the engine keeps of its keys' leaders.
type leadTotals struct {
	pool     pool
	switches int64
}

// countLead adds (sign 1) or takes out (−1) ks's leader from the totals.
func (e *Engine) countLead(ks *keyState, sign int64) {
	if ks.lead == nil {
		return
	}
	if sign > 0 {
		e.lead.pool.add(&ks.lead.score)
	} else {
		e.lead.pool.remove(&ks.lead.score)
	}
	e.lead.switches += sign * ks.lead.switches
}

// stepLeader scores the leader's answer for the event just applied to ks
// (target y; the learners' answers are in e.lastPred) and chooses the
// leader for the key's next event.
func (e *Engine) stepLeader(ks *keyState, y float64) {
	ld := ks.lead
	if ld == nil {
		ld = &leader{current: -1, score: newScorer(e.cfg.Score.Recent, e.cfg.Score.Fading)}
		ks.lead = ld
	}
	if c := ld.current; c >= 0 && e.lastOK[c] {
		e.lead.pool.remove(&ld.score)
		ld.score.score(y, e.lastPred[c], &e.intervals)
		e.lead.pool.add(&ld.score)
	} else {
		ld.score.Unscore()
		e.lead.pool.unscored++
	}
	best, bestR := int32(-1), 0.0
	for i := range ks.slots {
		if r, ok := recentRMSE(&ks.slots[i].score); ok && (best < 0 || r < bestR) {
			best, bestR = int32(i), r
		}
	}
	switch {
	case best < 0 || best == ld.current:
	case ld.current < 0:
		ld.current = best
	default:
		cur, _ := recentRMSE(&ks.slots[ld.current].score)
		if bestR < (1-e.cfg.Leader.Margin)*cur {
			ld.current = best
			ld.switches++
			e.lead.switches++
		}
	}
}

// recentRMSE is a scorer's recent RMSE, once it holds MinIntervalEvents
// recent errors.
func recentRMSE(s *Scorer) (float64, bool) {
	n := s.idx.Len()
	if n < MinIntervalEvents {
		return 0, false
	}
	return math.Sqrt(math.Max(s.recSq.Value(), 0) / float64(n)), true
}

// Leader returns the learner leading on key, or false when the engine keeps
// no leader or none qualifies on the key yet.
func (e *Engine) Leader(key string) (string, bool) {
	ks := e.lookup(key)
	if !e.cfg.Leader.On || ks == nil || ks.lead == nil || ks.lead.current < 0 {
		return "", false
	}
	return e.cfg.Learners[ks.lead.current].Name, true
}

func (l *leader) encode(w *encoder) {
	w.i64(int64(l.current))
	w.i64(l.switches)
	l.score.encode(w)
}

func (l *leader) decode(r *decoder, version uint32, learners int) {
	c := r.i64()
	if c < -1 || c >= int64(learners) {
		r.fail("a leader that is no learner")
		return
	}
	l.current = int32(c)
	l.switches = r.i64()
	l.score.decode(r, version)
}
