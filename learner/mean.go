package learner

import "tidemark/window"

// Mean predicts the mean target over its window — the last Count events,
// those within Span of event time, or all (the default). It is the baseline
// every learner's skill is measured against: 1 − rmse/rmse_mean.
//
// The running mean is Welford's (window.Moments) with removal, rebuilt from
// the window after every window-length of evictions. Cost O(1) amortised.
// Ready once the window holds an event.
type Mean struct {
	cfg     MeanConfig
	w       rows // d = 0: targets and times only; unused for All
	m       window.Moments
	evicted int
	trained int64
}

var _ Learner = (*Mean)(nil)

func newMean(cfg MeanConfig) *Mean {
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
	for s, ok := m.w.popExpired(); ok; s, ok = m.w.popExpired() {
		m.drop(s)
	}
}

// Trained implements Learner.
func (m *Mean) Trained() int64 { return m.trained }

// Predict implements Learner.
func (m *Mean) Predict([]float64) (float64, bool) {
	if m.m.N() == 0 {
		return 0, false
	}
	return m.m.Mean(), true
}

// Learn implements Learner.
func (m *Mean) Learn(_ []float64, y float64, t int64) {
	m.trained++
	if m.cfg.Window.All {
		m.m.Add(y)
		return
	}
	m.Advance(t)
	if s, ok := m.w.makeRoom(); ok {
		m.drop(s)
	}
	m.w.push(nil, y, t)
	m.m.Add(y)
	if m.evicted >= m.w.idx.Size() {
		m.m.Reset()
		for i := 0; i < m.w.len(); i++ {
			m.m.Add(m.w.y[m.w.idx.Slot(i)])
		}
		m.evicted = 0
	}
}

func (m *Mean) drop(s int) {
	m.m.Remove(m.w.y[s])
	m.evicted++
}

func (m *Mean) encode(w *encoder) {
	w.i64(m.trained)
	w.int(m.evicted)
	n, mean, m2 := m.m.State()
	w.i64(n)
	w.f64(mean)
	w.f64(m2)
	if !m.cfg.Window.All {
		m.w.encode(w)
	}
}

func (m *Mean) decode(r *decoder) error {
	m.trained = r.i64()
	m.evicted = r.int()
	n, mean, m2 := r.i64(), r.f64(), r.f64()
	m.m.SetState(n, mean, m2)
	if !m.cfg.Window.All {
		m.w.decode(r)
	}
	return r.err
}
