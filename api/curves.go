package api

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"sync"
	"time"

	"tidemark/learner"
	"tidemark/window"
)

// CurvePoint is one point of a learner's error curve: its recent-window
// errors after the event at Position.
type CurvePoint struct {
	Position learner.Position `json:"position"`
	Events   int64            `json:"events"`
	// Time is the latest event time the state had applied (absent when no
	// event had a time), Rejected the events refused so far.
	Time     *time.Time `json:"time,omitempty"`
	Rejected int64      `json:"rejected"`
	MAE      *float64   `json:"mae"`
	RMSE     *float64   `json:"rmse"`
}

// curves keeps the last points of every learner's recent error, sampled
// every CurveEvery applied events. They are written beside the checkpoints
// (DATA/curves.json, with the latest alarms) each time one is taken, and
// read back at start, so that a restart keeps them (save, load).
type curves struct {
	mu     sync.Mutex
	names  []string
	points []*window.Ring[CurvePoint]
}

func newCurves(specs []learner.Spec, n int) *curves {
	c := &curves{}
	for _, s := range specs {
		c.names = append(c.names, s.Name)
		c.points = append(c.points, window.NewRing[CurvePoint](n))
	}
	return c
}

func (c *curves) add(eng *learner.Engine) {
	var pos learner.Position
	if ps := eng.Positions(); len(ps) > 0 {
		pos = ps[len(ps)-1]
	}
	var at *time.Time
	if _, last, ok := eng.EventTimes(); ok {
		t := time.Unix(0, last).UTC()
		at = &t
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	for i := range c.points {
		_, mae, rmse := eng.Recent(i)
		c.points[i].Push(CurvePoint{Position: pos, Events: eng.Applied(), Time: at, Rejected: eng.Rejected(), MAE: mae, RMSE: rmse})
	}
}

// notes keeps the latest drift alarms and rejections for the page, newest
// last; the alarms are kept with the curves (save), the rejections only in
// memory.
type notes struct {
	mu         sync.Mutex
	alarms     *window.Ring[AlarmNote]
	rejections *window.Ring[RejectionNote]
}

// AlarmNote is a drift alarm: which learner, for which key, where and when.
type AlarmNote struct {
	Learner  string           `json:"learner"`
	Key      string           `json:"key"`
	Position learner.Position `json:"position"`
	Time     *time.Time       `json:"time,omitempty"` // the event's time
}

// RejectionNote is an event of the stream the engine refused.
type RejectionNote struct {
	Position learner.Position `json:"position"`
	Reason   string           `json:"reason"`
	At       time.Time        `json:"at"` // when it was refused
}

func newNotes() *notes {
	return &notes{alarms: window.NewRing[AlarmNote](200), rejections: window.NewRing[RejectionNote](20)}
}

func (n *notes) alarm(a AlarmNote) {
	n.mu.Lock()
	defer n.mu.Unlock()
	n.alarms.Push(a)
}

func (n *notes) rejected(r RejectionNote) {
	n.mu.Lock()
	defer n.mu.Unlock()
	n.rejections.Push(r)
}

// get returns copies, oldest first.
func (n *notes) get() ([]AlarmNote, []RejectionNote) {
	n.mu.Lock()
	defer n.mu.Unlock()
	return ringSlice(n.alarms), ringSlice(n.rejections)
}

func ringSlice[T any](r *window.Ring[T]) []T {
	out := make([]T, r.Len())
	for i := range out {
		out[i] = r.At(i)
	}
	return out
}

// trim drops the points after applied events: a restore took the state
// back, and what they showed did not happen to it.
func (c *curves) trim(applied int64) {
	c.mu.Lock()
	defer c.mu.Unlock()
	for i, r := range c.points {
		kept := window.NewRing[CurvePoint](r.Cap())
		for j := range r.Len() {
			if p := r.At(j); p.Events <= applied {
				kept.Push(p)
			}
		}
		c.points[i] = kept
	}
}

// get returns a copy of a learner's curve, oldest first, and whether it exists.
func (c *curves) get(name string) ([]CurvePoint, bool) {
	c.mu.Lock()
	defer c.mu.Unlock()
	for i, n := range c.names {
		if n == name {
			out := make([]CurvePoint, c.points[i].Len())
			for j := range out {
				out[j] = c.points[i].At(j)
			}
			return out, true
		}
	}
	return nil, false
}

// kept is what curves.json holds.
type kept struct {
	Curves map[string][]CurvePoint `json:"curves"`
	Alarms []AlarmNote             `json:"alarms"`
}

// save writes the curves and the latest alarms to path, through a
// temporary file renamed into place.
func save(path string, c *curves, n *notes) error {
	k := kept{Curves: map[string][]CurvePoint{}}
	for _, name := range c.names {
		k.Curves[name], _ = c.get(name)
	}
	k.Alarms, _ = n.get()
	b, err := json.Marshal(k)
	if err != nil {
		return err
	}
	tmp, err := os.CreateTemp(filepath.Dir(path), ".curves-*")
	if err != nil {
		return err
	}
	defer os.Remove(tmp.Name())
	if _, err := tmp.Write(b); err != nil {
		tmp.Close()
		return err
	}
	if err := tmp.Sync(); err != nil {
		tmp.Close()
		return err
	}
	if err := tmp.Close(); err != nil {
		return err
	}
	return os.Rename(tmp.Name(), path)
}

// load reads what save wrote into c and n, keeping only the points and
// alarms of a state that has applied at most applied events (the state
// restored at start may be older than the curves). A missing file is no
// error.
func load(path string, c *curves, n *notes, applied int64) error {
	b, err := os.ReadFile(path)
	if os.IsNotExist(err) {
		return nil
	}
	if err != nil {
		return err
	}
	var k kept
	if err := json.Unmarshal(b, &k); err != nil {
		return fmt.Errorf("%s: %w", path, err)
	}
	c.mu.Lock()
	for i, name := range c.names {
		for _, p := range k.Curves[name] {
			if p.Events <= applied {
				c.points[i].Push(p)
			}
		}
	}
	c.mu.Unlock()
	for _, a := range k.Alarms {
		n.alarm(a)
	}
	return nil
}
