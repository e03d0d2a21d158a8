package replay

import (
	"fmt"
	"strconv"

	"tidemark/learner"
)

// Late labels (ReplayConfig.LabelDelay): each event is a question when its
// time comes and a label LabelDelay later. The replayer keeps the events
// asked but not yet labelled, in line order; an event's arrival first
// applies those whose label is due by its time, then asks every learner for
// it. Applying an event scores the answers given for it (learner.Engine.Label).

// lateEvent is an event asked, waiting for its label.
type lateEvent struct {
	no     int64
	bad    error // a line that did not decode: skipped in its turn
	ev     learner.Event
	due    int64  // time + delay, Unix ns
	served []bool // per row, whether an answer was served for it
}

// late handles the event of line no under a label delay.
func (r *replayer) late(no int64, ev *learner.Event) error {
	if !ev.HasTime {
		return r.reject(no, fmt.Errorf("%w: the event has no time, and a label delay needs one", learner.ErrRejected))
	}
	if err := r.labelsDue(ev.Time); err != nil {
		return err
	}
	c := lateEvent{no: no, due: ev.Time + int64(r.cfg.LabelDelay), ev: *ev, served: r.ask(no, ev)}
	c.ev.Features = append([]learner.Feature(nil), ev.Features...) // the line's storage is reused
	r.waiting = append(r.waiting, c)
	return nil
}

// labelsDue applies, in line order, the waiting events whose labels have
// arrived by time now.
func (r *replayer) labelsDue(now int64) error {
	n := 0
	for n < len(r.waiting) && r.waiting[n].due <= now {
		if err := r.label(&r.waiting[n]); err != nil {
			return err
		}
		n++
	}
	r.waiting = r.waiting[n:]
	return nil
}

// flushLate labels every event still waiting: the history's end.
func (r *replayer) flushLate() error {
	for i := range r.waiting {
		if err := r.label(&r.waiting[i]); err != nil {
			return err
		}
	}
	r.waiting = nil
	return nil
}

// lateSkip queues a line that did not decode, to be skipped after the
// events before it.
func (r *replayer) lateSkip(no int64, err error) {
	c := lateEvent{no: no, bad: err}
	if n := len(r.waiting); n > 0 {
		c.due = r.waiting[n-1].due
	}
	r.waiting = append(r.waiting, c)
}

// label applies a waiting event and scores the answers given for it.
func (r *replayer) label(c *lateEvent) error {
	if c.bad != nil {
		r.eng.Skip(learner.Position{Partition: 0, Offset: c.no})
		return r.reject(c.no, c.bad)
	}
	if err := r.apply(c.no, &c.ev); err != nil {
		return err
	}
	for i, ok := range c.served {
		if ok {
			r.eng.Label(0, answerID(c.no, i), c.ev.Target, c.due)
		}
	}
	return nil
}

// rows is the number of answers asked per event: each learner's, and the
// leader's when the engine keeps one.
func (r *replayer) rows() int {
	n := len(r.eng.Config().Learners)
	if r.eng.Config().Leader.On {
		n++
	}
	return n
}

// ask serves every learner's answer for the event of line no, as of now,
// and says which were served.
func (r *replayer) ask(no int64, ev *learner.Event) []bool {
	specs := r.eng.Config().Learners
	served := make([]bool, r.rows())
	for i := range served {
		name := learner.LeaderName
		if i < len(specs) {
			name = specs[i].Name
		}
		p, err := r.eng.Predict(ev.Key, name, ev)
		if err != nil {
			continue // not ready, or a key not seen yet: nothing served
		}
		a := learner.Answer{ID: answerID(no, i), Key: ev.Key, Learner: i, Value: p.Value}
		if p.Conformal != nil {
			a.Low, a.High, a.HasInterval = p.Value-*p.Conformal, p.Value+*p.Conformal, true
		}
		if r.eng.PrepareAnswer(&a) != nil {
			continue
		}
		a.At, a.HasAt = ev.Time, true // asked at the event's time (the state's clock lags by the delay)
		served[i] = r.eng.Serve(a) == nil
	}
	return served
}

func answerID(no int64, row int) string {
	return strconv.FormatInt(no, 10) + "/" + strconv.Itoa(row)
}
