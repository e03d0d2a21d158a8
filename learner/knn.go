package learner

import (
	"math"
	"slices"
	"unsafe"

	"tidemark/window"
)

// KNN is k-nearest-neighbour regression over a sliding window of recent
// events (Fix & Hodges 1951; Cover & Hart 1967).
//
// Prediction for a query q is the mean target of the k window events nearest
// to q in Euclidean distance
//
//	dist(x, q) = sqrt( Σⱼ ((xⱼ − qⱼ)/sⱼ)² )
//
// where sⱼ = 1 with scale=none, and with scale=zscore sⱼ is the population
// standard deviation of feature j over the window's current contents, the
// query excluded (1 when that deviation is zero: a feature constant in the
// window then counts in raw units, as a standard scaler does). With weight=inverse the targets are weighted by 1/dist
// (Shepard 1968, "A two-dimensional interpolation function for irregularly-
// spaced data", Proc. ACM national conference); when some neighbours are at
// distance 0 the prediction is the mean of those alone. If the window holds
// fewer than k events all of them are used; equal distances are broken in
// favour of the more recent event. Targets are summed nearest first.
//
// The window is a count, a span of event time, or all events up to a memory
// cap (see rows); "more recent" is later in the window's order (arrival for
// a count, event time for a span). An event already older than a time
// window's bound on arrival is predicted and scored but not stored (Late
// counts it); after a gap longer than the window the window is empty and the
// next event goes unscored. The per-feature moments (window.Moments) follow
// events in and out exactly and are rebuilt from the window's contents when
// their rounding bound grows past window.RelTol, so the scales equal a fresh
// two-pass computation over the window.
//
// Cost: Predict O(n·d + n·k) worst case for n events in the window, usually
// O(n·d) since few candidates enter the k best; Learn O(d) amortised.
type KNN struct {
	cfg     KNNConfig
	d       int
	w       rows
	moms    []window.Moments
	trained int64
	late    int64 // events older than the time window on arrival, not stored

	inv  []float64  // scratch: 1/sⱼ² for the current predict
	best []neighbor // scratch: the k best, nearest first
}

type neighbor struct {
	dist2 float64
	y     float64
}

var _ Learner = (*KNN)(nil)

// cloneInto implements Learner.
func (m *KNN) cloneInto(dst Learner) Learner {
	d, ok := dst.(*KNN)
	if !ok || len(d.moms) != len(m.moms) || len(d.inv) != len(m.inv) || cap(d.best) != cap(m.best) {
		return m.clone()
	}
	w, moms, inv, best := d.w, d.moms, d.inv, d.best
	*d = *m
	d.w = m.w.cloneInto(w)
	copy(moms, m.moms)
	d.moms, d.inv, d.best = moms, inv, best[:len(m.best)]
	return d
}

// rebind implements Learner (k-NN's working space is its own).
func (m *KNN) rebind(**scratch) {}

// held implements Learner.
func (m *KNN) held() int64 {
	return int64(unsafe.Sizeof(*m)) + int64(len(m.moms))*int64(unsafe.Sizeof(window.Moments{})+8) +
		int64(cap(m.best))*int64(unsafe.Sizeof(neighbor{})) + m.w.held()
}

// touch implements Learner.
func (m *KNN) touch() float64 {
	v := m.w.touch()
	if len(m.moms) > 0 {
		v += m.moms[0].Mean()
	}
	return v
}

// clone implements Learner.
func (m *KNN) clone() Learner {
	c := *m
	c.w = m.w.clone()
	c.moms = slices.Clone(m.moms)
	c.inv = make([]float64, len(m.inv))
	c.best = make([]neighbor, len(m.best), cap(m.best))
	return &c
}

func newKNN(cfg KNNConfig, d int) *KNN {
	return &KNN{
		cfg:  cfg,
		d:    d,
		w:    newRows(d, cfg.Window, cfg.Max),
		moms: make([]window.Moments, d),
		inv:  make([]float64, d),
		best: make([]neighbor, 0, cfg.K),
	}
}

// Advance implements Learner.
func (m *KNN) Advance(t int64) {
	m.w.advance(t)
	evicted := false
	for s, ok := m.w.popExpired(); ok; s, ok = m.w.popExpired() {
		m.forget(s)
		evicted = true
	}
	if evicted {
		m.settle()
	}
}

// Late returns the number of events that were older than the time window's
// bound on arrival and so were not stored.
func (m *KNN) Late() int64 { return m.late }

// Trained implements Learner.
func (m *KNN) Trained() int64 { return m.trained }

// Len returns the number of events in the window.
func (m *KNN) Len() int { return m.w.len() }

// Predict implements Learner.
func (m *KNN) Predict(q []float64) (float64, bool) {
	y, ok, best := m.predict(q, m.inv, m.best)
	m.best = best
	return y, ok
}

// predictShared implements Learner: with scratch of its own, so that
// readers of a learner nobody changes may predict at once.
func (m *KNN) predictShared(q []float64) (float64, bool) {
	y, ok, _ := m.predict(q, make([]float64, m.d), make([]neighbor, 0, m.cfg.K))
	return y, ok
}

// predict is Predict with the scratch given: inv (d) and best (capacity k),
// returned grown.
func (m *KNN) predict(q, inv []float64, best []neighbor) (float64, bool, []neighbor) {
	if len(q) != m.d {
		panic(badDim)
	}
	n := m.w.len()
	if n == 0 {
		return 0, false, best
	}
	zscore := m.cfg.Scale == ScaleZScore
	if zscore {
		for j := range inv {
			v := m.moms[j].PopVariance()
			if v > 0 {
				inv[j] = 1 / v
			} else {
				inv[j] = 1
			}
		}
	}
	if !zscore {
		for j := range inv {
			inv[j] = 1 // x·1 is x: the same sums as without weights
		}
	}
	sc := scan{k: m.cfg.K, best: best[:0], worst: math.Inf(1), q: q[:m.d:m.d], inv: inv[:m.d:m.d], x: m.w.x, y: m.w.y, d: m.d}
	// Newest first, so that ties keep the more recent: the ring's slots
	// from the newest down to 0, then from its end down to the oldest.
	size := m.w.idx.Size()
	newest := m.w.idx.Slot(n - 1)
	oldest := m.w.idx.Slot(0)
	if oldest <= newest {
		sc.run(newest, oldest)
	} else {
		sc.run(newest, 0)
		sc.run(size-1, oldest)
	}
	best = sc.best
	if m.cfg.Weight == WeightInverse {
		return inverseWeighted(best), true, best
	}
	var sum float64
	for _, b := range best {
		sum += b.y
	}
	return sum / float64(len(best)), true, best
}

// scan finds the k nearest rows of a window for one query.
type scan struct {
	k     int
	best  []neighbor
	worst float64 // the k-th best distance, +Inf until k are found
	q     []float64
	inv   []float64 // per feature, the weight of its squared difference
	x     []float64 // rows, d each, by slot
	y     []float64
	d     int
}

// run offers the rows of slots hi down to lo (hi ≥ lo), in that order.
// Four rows are summed at once, each row's squared differences added in
// feature order as one row alone would be, so the distances are the same to
// the bit and so are the neighbours: the rows are then offered in order.
// One row's sum is a chain of dependent additions; four chains keep the
// processor busy while each waits.
func (sc *scan) run(hi, lo int) {
	if sc.d == 8 {
		sc.run8(hi, lo)
		return
	}
	d, q, inv, x := sc.d, sc.q, sc.inv, sc.x
	s := hi
	for ; s-3 >= lo; s -= 4 {
		r0 := x[s*d : s*d+d : s*d+d]
		r1 := x[(s-1)*d : (s-1)*d+d : (s-1)*d+d]
		r2 := x[(s-2)*d : (s-2)*d+d : (s-2)*d+d]
		r3 := x[(s-3)*d : (s-3)*d+d : (s-3)*d+d]
		var s0, s1, s2, s3 float64
		for j := range q {
			qj, w := q[j], inv[j]
			d0, d1, d2, d3 := r0[j]-qj, r1[j]-qj, r2[j]-qj, r3[j]-qj
			s0 += d0 * d0 * w
			s1 += d1 * d1 * w
			s2 += d2 * d2 * w
			s3 += d3 * d3 * w
		}
		if s0 < sc.worst || s1 < sc.worst || s2 < sc.worst || s3 < sc.worst || len(sc.best) < sc.k {
			sc.offer(s0, s)
			sc.offer(s1, s-1)
			sc.offer(s2, s-2)
			sc.offer(s3, s-3)
		}
	}
	for ; s >= lo; s-- {
		row := x[s*d : s*d+d : s*d+d]
		var sum float64
		for j := range q {
			diff := row[j] - q[j]
			sum += diff * diff * inv[j]
		}
		sc.offer(sum, s)
	}
}

// run8 is run for d = 8, with the rows' bounds known: the same sums.
// (Partial distances — passing over rows whose first features already
// reach the k-th best — were measured slower here: on rows drawn at random
// the test goes either way half the time, and the mispredicted branches
// cost more than the arithmetic saved.)
func (sc *scan) run8(hi, lo int) {
	q, inv := (*[8]float64)(sc.q), (*[8]float64)(sc.inv)
	x := sc.x
	s := hi
	for ; s-3 >= lo; s -= 4 {
		r0 := (*[8]float64)(x[s*8 : s*8+8])
		r1 := (*[8]float64)(x[(s-1)*8 : (s-1)*8+8])
		r2 := (*[8]float64)(x[(s-2)*8 : (s-2)*8+8])
		r3 := (*[8]float64)(x[(s-3)*8 : (s-3)*8+8])
		var s0, s1, s2, s3 float64
		var qj, w, d0, d1, d2, d3 float64
		// Unrolled: feature by feature, as the loop of run.
		qj, w = q[0], inv[0]
		d0, d1, d2, d3 = r0[0]-qj, r1[0]-qj, r2[0]-qj, r3[0]-qj
		s0 += d0 * d0 * w
		s1 += d1 * d1 * w
		s2 += d2 * d2 * w
		s3 += d3 * d3 * w
		qj, w = q[1], inv[1]
		d0, d1, d2, d3 = r0[1]-qj, r1[1]-qj, r2[1]-qj, r3[1]-qj
		s0 += d0 * d0 * w
		s1 += d1 * d1 * w
		s2 += d2 * d2 * w
		s3 += d3 * d3 * w
		qj, w = q[2], inv[2]
		d0, d1, d2, d3 = r0[2]-qj, r1[2]-qj, r2[2]-qj, r3[2]-qj
		s0 += d0 * d0 * w
		s1 += d1 * d1 * w
		s2 += d2 * d2 * w
		s3 += d3 * d3 * w
		qj, w = q[3], inv[3]
		d0, d1, d2, d3 = r0[3]-qj, r1[3]-qj, r2[3]-qj, r3[3]-qj
		s0 += d0 * d0 * w
		s1 += d1 * d1 * w
		s2 += d2 * d2 * w
		s3 += d3 * d3 * w
		qj, w = q[4], inv[4]
		d0, d1, d2, d3 = r0[4]-qj, r1[4]-qj, r2[4]-qj, r3[4]-qj
		s0 += d0 * d0 * w
		s1 += d1 * d1 * w
		s2 += d2 * d2 * w
		s3 += d3 * d3 * w
		qj, w = q[5], inv[5]
		d0, d1, d2, d3 = r0[5]-qj, r1[5]-qj, r2[5]-qj, r3[5]-qj
		s0 += d0 * d0 * w
		s1 += d1 * d1 * w
		s2 += d2 * d2 * w
		s3 += d3 * d3 * w
		qj, w = q[6], inv[6]
		d0, d1, d2, d3 = r0[6]-qj, r1[6]-qj, r2[6]-qj, r3[6]-qj
		s0 += d0 * d0 * w
		s1 += d1 * d1 * w
		s2 += d2 * d2 * w
		s3 += d3 * d3 * w
		qj, w = q[7], inv[7]
		d0, d1, d2, d3 = r0[7]-qj, r1[7]-qj, r2[7]-qj, r3[7]-qj
		s0 += d0 * d0 * w
		s1 += d1 * d1 * w
		s2 += d2 * d2 * w
		s3 += d3 * d3 * w
		if s0 < sc.worst || s1 < sc.worst || s2 < sc.worst || s3 < sc.worst || len(sc.best) < sc.k {
			sc.offer(s0, s)
			sc.offer(s1, s-1)
			sc.offer(s2, s-2)
			sc.offer(s3, s-3)
		}
	}
	for ; s >= lo; s-- {
		row := (*[8]float64)(x[s*8 : s*8+8])
		var sum float64
		for j := 0; j < 8; j++ {
			diff := row[j] - q[j]
			sum += diff * diff * inv[j]
		}
		sc.offer(sum, s)
	}
}

// offer takes the row of slot s, at squared distance dist2, among the k
// best if it is nearer than the k-th (or fewer than k are held).
func (sc *scan) offer(dist2 float64, s int) {
	if dist2 < sc.worst || len(sc.best) < sc.k {
		sc.best = insertNeighbor(sc.best, sc.k, neighbor{dist2, sc.y[s]})
		if len(sc.best) == sc.k {
			sc.worst = sc.best[sc.k-1].dist2
		}
	}
}

// insertNeighbor inserts nb into best (sorted by distance, at most k long)
// after every entry at the same distance: those were seen first, so they are
// more recent.
func insertNeighbor(best []neighbor, k int, nb neighbor) []neighbor {
	i := len(best)
	for i > 0 && best[i-1].dist2 > nb.dist2 {
		i--
	}
	if len(best) < k {
		best = append(best, neighbor{})
	} else if i == k {
		return best
	}
	copy(best[i+1:], best[i:len(best)-1])
	best[i] = nb
	return best
}

func inverseWeighted(best []neighbor) float64 {
	if best[0].dist2 == 0 {
		var sum float64
		n := 0
		for _, b := range best {
			if b.dist2 != 0 {
				break
			}
			sum += b.y
			n++
		}
		return sum / float64(n)
	}
	var num, den float64
	for _, b := range best {
		w := 1 / math.Sqrt(b.dist2)
		num += w * b.y
		den += w
	}
	return num / den
}

// Learn implements Learner.
func (m *KNN) Learn(x []float64, y float64, t int64) {
	if len(x) != m.d {
		panic(badDim)
	}
	m.Advance(t)
	if m.w.late(t) {
		m.late++
		return
	}
	if s, ok := m.w.makeRoom(); ok {
		m.forget(s)
	}
	m.w.push(x, y, t)
	if m.cfg.Scale == ScaleZScore {
		for j, v := range x {
			m.moms[j].Add(v)
		}
		m.settle()
	}
	m.trained++
}

// forget removes the row in slot s (just popped) from the running moments.
func (m *KNN) forget(s int) {
	if m.cfg.Scale != ScaleZScore {
		return
	}
	for j, v := range m.w.row(s) {
		m.moms[j].Remove(v)
	}
}

// settle rebuilds the moments of every feature whose rounding bound has grown
// past window.RelTol (after a huge value left, or the window moved far from
// the moments' shift). Cost O(d) when none does, O(n) per rebuilt feature.
func (m *KNN) settle() {
	for j := range m.moms {
		if m.moms[j].Imprecise() {
			m.rebuild(j)
		}
	}
}

// rebuild recomputes feature j's moments from the window's contents.
func (m *KNN) rebuild(j int) {
	d := m.d
	m.moms[j].Rebuild(m.w.len(), func(i int) float64 { return m.w.x[m.w.idx.Slot(i)*d+j] })
}

func (m *KNN) encode(w *encoder) {
	w.i64(m.trained)
	w.i64(m.late)
	m.w.encode(w)
	for i := range m.moms {
		encodeMoments(w, &m.moms[i])
	}
}

func (m *KNN) decode(r *decoder) error {
	m.trained = r.i64()
	if r.ver >= 5 {
		m.late = r.i64()
	} else {
		r.i64() // evictions since the last rebuild
	}
	m.w.decode(r)
	for i := range m.moms {
		decodeMoments(r, &m.moms[i])
	}
	if r.ver < 5 && m.cfg.Scale == ScaleZScore {
		// Older states kept Welford moments; rebuild them from the window.
		for j := range m.moms {
			m.rebuild(j)
		}
	}
	return r.err
}
