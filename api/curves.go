package api

import (
	"sync"

	"tidemark/learner"
	"tidemark/window"
)

// CurvePoint is one point of a learner's error curve: its recent-window
// errors after the event at Position.
type CurvePoint struct {
	Position learner.Position `json:"position"`
	Events   int64            `json:"events"`
	MAE      *float64         `json:"mae"`
	RMSE     *float64         `json:"rmse"`
}

// curves keeps the last points of every learner's recent error, sampled
// every CurveEvery applied events. They live in memory only: after a restart
// a curve starts again (the checkpointed state is the model, not its history).
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
	c.mu.Lock()
	defer c.mu.Unlock()
	for i := range c.points {
		_, mae, rmse := eng.Recent(i)
		c.points[i].Push(CurvePoint{Position: pos, Events: eng.Applied(), MAE: mae, RMSE: rmse})
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
