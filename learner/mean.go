package learner

import (
	"tidemark/window"
	"unsafe"
)

// Mean predicts the mean target over its window — the last Count events,
// those within Span of event time, or all (the default). It is the baseline
// every learner's skill is measured against: 1 − rmse/rmse_mean.
//
// The running mean is window.Moments, which follows targets in and out
// exactly and is rebuilt from the window when its rounding bound grows past
// window.RelTol (after a huge target leaves). Cost O(1) amortised. Ready once
// the window holds an event; after a gap longer than a time window the
// window is empty and the next event goes unscored. A target older than a
// time window's bound on arrival is not stored (Late counts it).
type Mean struct {
	cfg     *MeanConfig // the spec's, shared by the keys
	w       rows        // d = 0: targets and times only; unused for All
	m       window.Moments
	trained int64
	late    int64
}

var _ Learner = (*Mean)(nil)

// cloneInto implements Learner.
func (m *Mean) cloneInto(dst Learner) Learner {
	d, ok := dst.(*Mean)
	if !ok {
		return m.clone()
	}
	w := d.w
	*d = *m
	d.w = m.w.cloneInto(w)
	return d
}

// rebind implements Learner (a mean uses no shared working space).
func (m *Mean) rebind(**scratch) {}

// held implements Learner.
func (m *Mean) held() int64 { return int64(unsafe.Sizeof(*m)) + m.w.held() }

// touch implements Learner.
func (m *Mean) touch() float64 { return m.w.touch() + float64(m.trained) }

// clone implements Learner.
func (m *Mean) clone() Learner {
	c := *m
	c.w = m.w.clone()
	return &c
}

func newMean(cfg *MeanConfig) *Mean {
	m := &Mean{cfg: cfg}
	if !cfg.Window.All {
		m.w = newRows(0, cfg.Window, cfg.Max)
	}
	return m
}

// Advance implements Learner.
func (m *Mean) Advance(t int64) {
	if m.cfg.Window.Span == 0 {
		return
	}
	m.w.advance(t)
	evicted := false
	for s, ok := m.w.popExpired(); ok; s, ok = m.w.popExpired() {
		m.m.Remove(m.w.y[s])
		evicted = true
	}
	if evicted {
		m.settle()
	}
}

// Late returns the number of targets that were older than the time window's
// bound on arrival and so were not stored.
func (m *Mean) Late() int64 { return m.late }

// Trained implements Learner.
func (m *Mean) Trained() int64 { return m.trained }

// predictShared implements Learner (Predict uses no scratch).
func (m *Mean) predictShared(x []float64) (float64, bool) { return m.Predict(x) }

// Predict implements Learner.
func (m *Mean) Predict([]float64) (float64, bool) {
	if m.m.N() == 0 {
		return 0, false
	}
	return m.m.Mean(), true
}

// Learn implements Learner.
func (m *Mean) Learn(_ []float64, y float64, t int64) {
	if m.cfg.Window.All {
		// Cumulative: nothing leaves, so the compensated sums stay exact
		// to their final rounding and need no rebuild.
		m.trained++
		m.m.Add(y)
		return
	}
	m.Advance(t)
	if m.w.late(t) {
		m.late++
		return
	}
	m.trained++
	if s, ok := m.w.makeRoom(); ok {
		m.m.Remove(m.w.y[s])
	}
	m.w.push(nil, y, t)
	m.m.Add(y)
	m.settle()
}

// settle rebuilds the moments from the window when their rounding bound has
// grown past window.RelTol.
func (m *Mean) settle() {
	if m.m.Imprecise() {
		m.rebuild()
	}
}

func (m *Mean) rebuild() {
	m.m.Rebuild(m.w.len(), func(i int) float64 { return m.w.y[m.w.idx.Slot(i)] })
}

func (m *Mean) encode(w *encoder) {
	w.i64(m.trained)
	w.i64(m.late)
	encodeMoments(w, &m.m)
	if !m.cfg.Window.All {
		m.w.encode(w)
	}
}

func (m *Mean) decode(r *decoder) error {
	m.trained = r.i64()
	if r.ver >= 5 {
		m.late = r.i64()
	} else {
		r.i64() // evictions since the last rebuild
	}
	decodeMoments(r, &m.m)
	if !m.cfg.Window.All {
		m.w.decode(r)
		if r.ver < 5 && r.err == nil {
			m.rebuild()
		}
	}
	return r.err
}
