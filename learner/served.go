package learner

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"
	"time"

	"tidemark/window"
)

// Served scoring (issue 16): the answers a service actually gave, each
// scored against its label when the label arrives, apart from the
// prequential score. The prequential score asks how the model would have
// done on each event just before training on it; the served score asks how
// good the answers the callers received were — from the model as it was
// when they asked, which with labels hours late is an older model.
//
// An answer is registered in its key's partition "after" an offset: the
// partition's high-water mark when the service registered it (Answer.After).
// A label is an event naming the answer (Event.AnswerID); it matches the
// answer when its own offset is after the answer's. The service writes each
// answer to a durable log of its own before it returns it, with After, so
// that a restart reading that log back registers every answer at the same
// place among the events: the served state, like the rest, is a function of
// the events and the answers logged (Engine.Serve takes answers from the
// log in any order and keeps each after its offset).
//
// Time is the stream's own: an answer's At is the latest event time its
// partition had applied when it was served; a label's delay is the
// partition's latest event time when the label arrived, minus At. Answers
// wait at most ServedConfig.TTL of that clock and ServedConfig.Pending at
// once per partition; past either the oldest waiting answer is dropped and
// counted (expired, evicted). All of this is deterministic: no wall clock.

// Served scoring defaults.
const (
	DefaultServedPending = 100_000
	DefaultServedTTL     = 24 * time.Hour
)

// ErrDuplicateAnswer: an answer id that is already waiting for its label.
var ErrDuplicateAnswer = errors.New("learner: answer id already waiting for its label")

// ServedConfig bounds the answers waiting for their labels, per partition.
// Like the key cap it is not in the configuration digest: it decides which
// answers wait, not what the state means.
type ServedConfig struct {
	Pending int           // answers waiting at once per partition; 0: DefaultServedPending
	TTL     time.Duration // on the stream's clock; 0: DefaultServedTTL
}

func (c ServedConfig) withDefaults() ServedConfig {
	if c.Pending <= 0 {
		c.Pending = DefaultServedPending
	}
	if c.TTL <= 0 {
		c.TTL = DefaultServedTTL
	}
	return c
}

// Answer is one served prediction.
type Answer struct {
	ID          string
	Key         string
	Partition   int32
	Learner     int // index in Config.Learners; len(Config.Learners) for the leader
	Value       float64
	Low, High   float64
	HasInterval bool
	At          int64 // the partition's latest event time when served (Unix ns), if HasAt
	HasAt       bool
	After       int64  // the partition offset it was registered after
	Log         string // the served log that holds it (see Engine.Serve), and its offset there
	Seq         int64

	done bool // labelled, expired or evicted (still in the queue)
}

// delayBuckets are the upper bounds, in seconds, of the label delay
// histogram (the last bucket is everything longer).
var delayBuckets = [...]float64{1, 10, 60, 300, 900, 1800, 3600, 7200, 14400, 28800, 86400, 172800, 604800}

// DelayBuckets returns the label delay histogram's upper bounds in seconds.
func DelayBuckets() []float64 { return delayBuckets[:] }

// servedStats is one learner's (or the leader's) served score in a partition.
type servedStats struct {
	answers, labelled, intervals, covered int64
	sumAbs, sumSq, sumErr, width          float64
	fadAbs, fadSq, fadW                   float64
	delayN                                int64
	delaySum, delayMax                    float64 // seconds
	buckets                               [len(delayBuckets) + 1]int64
}

// servedBook is a partition's served answers: those waiting (in
// registration order), those registered after offsets not yet applied
// (sorted by After, Log, Seq), the logs read into the state, the scores.
type servedBook struct {
	pending                                map[string]*Answer
	queue                                  []*Answer // waiting, in registration order; done ones are skipped
	head                                   int
	due                                    int       // waiting answers (not done, in queue)
	sched                                  []*Answer // registered after an offset the partition has not reached
	logs                                   map[string]int64
	now                                    int64 // the latest time a label brought (Engine.Label), beyond the partition's events
	stats                                  []servedStats
	expired, evicted, unmatched, labelOnly int64
}

func newBook(rows int) *servedBook {
	return &servedBook{pending: map[string]*Answer{}, logs: map[string]int64{}, stats: make([]servedStats, rows)}
}

// book returns p's served book, made when new.
func (e *Engine) book(p *part) *servedBook {
	if p.served == nil {
		p.served = newBook(len(e.cfg.Learners) + 1)
	}
	return p.served
}

// clock returns the partition's stream clock: its latest event time, or a
// later time a label brought.
func (b *servedBook) clock(p *part) (int64, bool) {
	t, ok := p.times.last, p.times.set
	if b != nil && b.now != 0 && (!ok || b.now > t) {
		t, ok = b.now, true
	}
	return t, ok
}

// PrepareAnswer fills in where a live answer registers — its key's
// partition, After (the partition's high-water mark) and At (its clock) —
// and checks that its id is not waiting already. Serve then registers it.
func (e *Engine) PrepareAnswer(a *Answer) error {
	ks := e.lookup(a.Key)
	if ks == nil {
		return fmt.Errorf("%w: key %q has no events yet", ErrUnknownKey, a.Key)
	}
	if a.Learner < 0 || a.Learner > len(e.cfg.Learners) {
		return fmt.Errorf("%w: answer of learner %d", ErrUnknownLearner, a.Learner)
	}
	p := e.parts[ks.partition]
	a.Partition, a.After = ks.partition, p.hwm
	a.At, a.HasAt = p.served.clock(p)
	if b := p.served; b != nil && b.pending[a.ID] != nil {
		return fmt.Errorf("%w: %q", ErrDuplicateAnswer, truncate(a.ID))
	}
	return nil
}

// Serve registers answer a in its partition after offset a.After: waiting at
// once when the partition has applied that offset, else when it does. The
// answers of one log come in the order of their offsets there (a.Seq); an
// answer the state has read past (a.Seq at or below what it holds of a.Log)
// is already in it and ignored. An id already waiting is refused with
// ErrDuplicateAnswer. Answers of a partition the
// state does not hold yet are kept until its first event (not in the state
// bytes: they are read from the log again).
func (e *Engine) Serve(a Answer) error {
	if e.frozen {
		panic("learner: Serve on a published engine")
	}
	if a.Learner < 0 || a.Learner > len(e.cfg.Learners) {
		return fmt.Errorf("%w: answer of learner %d", ErrUnknownLearner, a.Learner)
	}
	p := e.parts[a.Partition]
	if p == nil {
		if e.waiting == nil {
			e.waiting = map[int32][]*Answer{}
		}
		w := e.waiting[a.Partition]
		if a.Log != "" && slices.ContainsFunc(w, func(b *Answer) bool { return b.Log == a.Log && b.Seq == a.Seq }) {
			return nil
		}
		e.waiting[a.Partition] = insertSched(w, &a)
		return nil
	}
	b := e.book(p)
	if a.Log != "" {
		if a.Seq <= b.logs[a.Log] {
			return nil
		}
		b.logs[a.Log] = a.Seq // the highest: they come in order
	}
	e.servedChanges++
	c := a
	if a.After > p.hwm {
		// Registered after events not applied yet: it waits for them, and
		// its id is checked then, against the answers waiting at that
		// point, as it was when it was served.
		b.sched = insertSched(b.sched, &c)
		return nil
	}
	if b.pending[a.ID] != nil {
		return fmt.Errorf("%w: %q", ErrDuplicateAnswer, truncate(a.ID))
	}
	e.enqueue(b, &c)
	return nil
}

// insertSched inserts a into s, kept sorted by (After, Log, Seq).
func insertSched(s []*Answer, a *Answer) []*Answer {
	i, _ := slices.BinarySearchFunc(s, a, schedOrder)
	return slices.Insert(s, i, a)
}

func schedOrder(x, y *Answer) int {
	if x.After != y.After {
		return cmpInt(x.After, y.After)
	}
	if c := strings.Compare(x.Log, y.Log); c != 0 {
		return c
	}
	return cmpInt(x.Seq, y.Seq)
}

func cmpInt(a, b int64) int {
	switch {
	case a < b:
		return -1
	case a > b:
		return 1
	}
	return 0
}

// enqueue makes a wait for its label, dropping the oldest waiting answer
// while more than the cap wait.
func (e *Engine) enqueue(b *servedBook, a *Answer) {
	b.pending[a.ID] = a
	b.stats[a.Learner].answers++
	b.queue = append(b.queue, a)
	b.due++
	for b.due > e.served.Pending {
		if o := b.pop(); o != nil {
			b.evicted++
		}
	}
}

// pop drops the oldest waiting answer and returns it (nil: none).
func (b *servedBook) pop() *Answer {
	for b.head < len(b.queue) {
		a := b.queue[b.head]
		b.queue[b.head] = nil
		b.head++
		if !a.done {
			a.done = true
			delete(b.pending, a.ID)
			b.due--
			b.compact()
			return a
		}
	}
	b.compact()
	return nil
}

// compact drops the queue's consumed front once it is most of the queue.
func (b *servedBook) compact() {
	if b.head > 64 && b.head*2 > len(b.queue) {
		n := copy(b.queue, b.queue[b.head:])
		clear(b.queue[n:])
		b.queue, b.head = b.queue[:n], 0
	}
}

// promote makes the scheduled answers registered before offset q wait.
func (e *Engine) promote(b *servedBook, q int64) {
	n := 0
	for n < len(b.sched) && b.sched[n].After < q {
		if a := b.sched[n]; b.pending[a.ID] == nil {
			e.enqueue(b, a)
		} // else refused when it was served: it was never answered
		n++
	}
	if n > 0 {
		b.sched = slices.Delete(b.sched, 0, n)
	}
}

// expire drops the waiting answers older than the TTL on the clock, oldest
// first.
func (e *Engine) expire(b *servedBook, p *part) {
	now, ok := b.clock(p)
	if !ok {
		return
	}
	ttl := int64(e.served.TTL)
	for b.head < len(b.queue) {
		a := b.queue[b.head]
		if a.done {
			b.queue[b.head] = nil
			b.head++
			continue
		}
		if !a.HasAt || a.At > now-ttl {
			break
		}
		b.pop()
		b.expired++
	}
	b.compact()
}

// label scores the answer id against target y at the partition's clock.
func (e *Engine) label(p *part, id string, y float64) {
	e.servedChanges++
	b := e.book(p)
	a := b.pending[id]
	if a == nil || a.done {
		b.unmatched++ // none such waits: unknown, labelled already, dropped, or served after this event
		return
	}
	delete(b.pending, id)
	a.done = true
	b.due--
	s := &b.stats[a.Learner]
	err := y - a.Value
	s.labelled++
	s.sumAbs += math.Abs(err)
	s.sumSq += err * err
	s.sumErr += err
	alpha := e.cfg.Score.Fading
	s.fadAbs = alpha*s.fadAbs + math.Abs(err)
	s.fadSq = alpha*s.fadSq + err*err
	s.fadW = alpha*s.fadW + 1
	if a.HasInterval {
		s.intervals++
		s.width += a.High - a.Low
		if y >= a.Low && y <= a.High {
			s.covered++
		}
	}
	if now, ok := b.clock(p); ok && a.HasAt {
		d := math.Max(float64(now-a.At)/1e9, 0)
		s.delayN++
		s.delaySum += d
		s.delayMax = math.Max(s.delayMax, d)
		i, _ := slices.BinarySearch(delayBuckets[:], d)
		s.buckets[i]++
	}
	b.compact()
}

// servedEvent does the served work of an event at p's high-water mark:
// scheduled answers before it wait, its label (if any) is scored, old
// answers expire.
func (e *Engine) servedEvent(p *part, ev *Event) {
	b := p.served
	if b == nil && ev.AnswerID == "" {
		return
	}
	b = e.book(p)
	if ev.AnswerID != "" {
		e.label(p, ev.AnswerID, ev.Target)
	}
	e.expire(b, p)
}

// beforeEvent makes the answers registered before offset q of p wait.
func (e *Engine) beforeEvent(p *part, q int64) {
	if b := p.served; b != nil && len(b.sched) > 0 {
		e.promote(b, q)
	}
}

// Label scores answer id of partition p against target y as if its label
// arrived at stream time now (Unix ns): what a replay that simulates late
// labels calls (the service's labels are events naming their answer).
func (e *Engine) Label(partition int32, id string, y float64, now int64) {
	p := e.parts[partition]
	if p == nil {
		return
	}
	b := e.book(p)
	if now > b.now {
		b.now = now
	}
	e.label(p, id, y)
	e.expire(b, p)
}

// adoptWaiting moves the answers kept for partition n, which the state now
// holds, into its book.
func (e *Engine) adoptWaiting(n int32) {
	w := e.waiting[n]
	if len(w) == 0 {
		return
	}
	delete(e.waiting, n)
	for _, a := range w {
		e.Serve(*a) // cannot fail: ids were checked among themselves, the book is new
	}
}

// ServedChanges counts the answers registered and labels seen: a reader
// that publishes copies of the state compares it to know whether the served
// figures changed (events alone do not tell: answers come between them).
func (e *Engine) ServedChanges() int64 { return e.servedChanges }

// ServedLogs returns, for each served log the state has read, the highest
// offset it holds of it, over the partitions given (all when none): where a
// restart reads each log from, and what a log may forget.
func (e *Engine) ServedLogs(partitions ...int32) map[string]int64 {
	out := map[string]int64{}
	for n, p := range e.parts {
		if p.served == nil || (len(partitions) > 0 && !slices.Contains(partitions, n)) {
			continue
		}
		for l, s := range p.served.logs {
			out[l] = max(out[l], s)
		}
	}
	return out
}

// ServedLog returns the highest offset of log the state holds in partition p.
func (e *Engine) ServedLog(partition int32, log string) int64 {
	if p := e.parts[partition]; p != nil && p.served != nil {
		return p.served.logs[log]
	}
	return 0
}

// ServedReport is what the served answers scored: per learner (and the
// leader) the scores of the answers that got their labels, and the answers
// still waiting or dropped. Its scores are of what the callers received;
// compare them with the prequential ones of the same learner.
type ServedReport struct {
	Learners []ServedMetrics `json:"learners"`
	Leader   *ServedMetrics  `json:"leader,omitempty"`
	// Pending answers wait for their labels; Expired waited longer than
	// the TTL, Evicted were dropped for the cap; Unmatched labels named no
	// waiting answer (unknown, labelled already, dropped, or served after
	// the label); LabelOnly counts labels that carried no features.
	Pending    int64   `json:"pending"`
	Expired    int64   `json:"expired"`
	Evicted    int64   `json:"evicted"`
	Unmatched  int64   `json:"unmatched_labels"`
	LabelOnly  int64   `json:"label_only"`
	TTLSeconds float64 `json:"ttl_seconds"`
	MaxPending int     `json:"max_pending_per_partition"`
}

// ServedMetrics is one learner's served score.
type ServedMetrics struct {
	Name     string   `json:"name"`
	Answers  int64    `json:"answers"`  // served and registered
	Labelled int64    `json:"labelled"` // of those, scored against their labels
	MAE      *float64 `json:"mae"`
	RMSE     *float64 `json:"rmse"`
	Bias     *float64 `json:"bias"`
	// FadingRMSE weighs recent labels more (the prequential fading factor).
	FadingRMSE *float64 `json:"fading_rmse"`
	// Coverage is the share of labelled answers with an interval whose
	// interval held the label; Width their mean width.
	Intervals int64      `json:"intervals"`
	Coverage  *float64   `json:"coverage"`
	Width     *float64   `json:"width"`
	Delay     DelayStats `json:"label_delay"`
}

// DelayStats is the distribution of label delays on the stream's clock.
type DelayStats struct {
	N           int64    `json:"n"`
	MeanSeconds *float64 `json:"mean_seconds"`
	MaxSeconds  *float64 `json:"max_seconds"`
	// Buckets counts delays at most each bound of BoundsSeconds (the last
	// count: longer than every bound).
	BoundsSeconds []float64 `json:"bounds_seconds"`
	Buckets       []int64   `json:"buckets"`
}

// ServedTotals are the served scores of an engine in a form that adds up
// exactly across engines holding other partitions (Totals).
type ServedTotals struct {
	Rows   []ServedRowTotals `json:"rows"`   // per learner, then the leader
	Counts [5]int64          `json:"counts"` // pending, expired, evicted, unmatched, label only
}

// ServedRowTotals is one row of ServedTotals.
type ServedRowTotals struct {
	Answers, Labelled, Intervals, Covered, DelayN int64
	Sums                                          [8]window.Exact // abs, sq, err, width, fading abs, fading sq, fading weight, delay
	DelayMax                                      float64
	Buckets                                       [len(delayBuckets) + 1]int64
}

// servedTotals sums the partitions' books; nil when nothing was served.
func (e *Engine) servedTotals() *ServedTotals {
	var t *ServedTotals
	for _, p := range e.parts {
		if p.served == nil {
			continue
		}
		pt := p.served.totals()
		if t == nil {
			t = pt
		} else {
			t.add(pt)
		}
	}
	return t
}

// totals are the book's figures as ServedTotals (its float sums exact).
func (b *servedBook) totals() *ServedTotals {
	t := &ServedTotals{Rows: make([]ServedRowTotals, len(b.stats)),
		Counts: [5]int64{int64(b.due + len(b.sched)), b.expired, b.evicted, b.unmatched, b.labelOnly}}
	for i := range b.stats {
		s, r := &b.stats[i], &t.Rows[i]
		r.Answers, r.Labelled, r.Intervals, r.Covered, r.DelayN = s.answers, s.labelled, s.intervals, s.covered, s.delayN
		for j, v := range [8]float64{s.sumAbs, s.sumSq, s.sumErr, s.width, s.fadAbs, s.fadSq, s.fadW, s.delaySum} {
			r.Sums[j].Add(v)
		}
		r.DelayMax, r.Buckets = s.delayMax, s.buckets
	}
	return t
}

// add adds o's rows and counts to t.
func (t *ServedTotals) add(o *ServedTotals) {
	for i := range t.Rows {
		r, s := &t.Rows[i], &o.Rows[i]
		r.Answers += s.Answers
		r.Labelled += s.Labelled
		r.Intervals += s.Intervals
		r.Covered += s.Covered
		r.DelayN += s.DelayN
		for j := range r.Sums {
			r.Sums[j].AddExact(&s.Sums[j])
		}
		r.DelayMax = math.Max(r.DelayMax, s.DelayMax)
		for j := range r.Buckets {
			r.Buckets[j] += s.Buckets[j]
		}
	}
	for j := range t.Counts {
		t.Counts[j] += o.Counts[j]
	}
}

// report rounds the totals into a report.
func (t *ServedTotals) report(c *Config) *ServedReport {
	if t == nil {
		return nil
	}
	sc := c.Served.withDefaults()
	r := &ServedReport{Pending: t.Counts[0], Expired: t.Counts[1], Evicted: t.Counts[2], Unmatched: t.Counts[3], LabelOnly: t.Counts[4],
		TTLSeconds: sc.TTL.Seconds(), MaxPending: sc.Pending}
	for i := range t.Rows {
		name := LeaderName
		if i < len(c.Learners) {
			name = c.Learners[i].Name
		}
		m := t.Rows[i].metrics(name)
		if i < len(c.Learners) {
			r.Learners = append(r.Learners, m)
		} else if c.Leader.On || m.Answers > 0 {
			r.Leader = &m
		}
	}
	return r
}

func (r *ServedRowTotals) metrics(name string) ServedMetrics {
	v := func(i int) float64 { return r.Sums[i].Value() }
	m := ServedMetrics{Name: name, Answers: r.Answers, Labelled: r.Labelled, Intervals: r.Intervals,
		Delay: DelayStats{N: r.DelayN, BoundsSeconds: delayBuckets[:], Buckets: slices.Clone(r.Buckets[:])}}
	if n := float64(r.Labelled); n > 0 {
		m.MAE, m.RMSE, m.Bias = ptr(v(0)/n), ptr(math.Sqrt(math.Max(v(1), 0)/n)), ptr(v(2)/n)
		if w := v(6); w > 0 {
			m.FadingRMSE = ptr(math.Sqrt(math.Max(v(5), 0) / w))
		}
	}
	if n := float64(r.Intervals); n > 0 {
		m.Coverage, m.Width = ptr(float64(r.Covered)/n), ptr(v(3)/n)
	}
	if n := float64(r.DelayN); n > 0 {
		m.Delay.MeanSeconds, m.Delay.MaxSeconds = ptr(v(7)/n), ptr(r.DelayMax)
	}
	return m
}

// clone copies the book's scores and counts for a published copy, which
// reports them; the answers themselves stay with the engine that owns them
// (a published copy is never encoded nor changed).
func (b *servedBook) clone() *servedBook {
	if b == nil {
		return nil
	}
	return &servedBook{stats: slices.Clone(b.stats), due: b.due + len(b.sched), expired: b.expired, evicted: b.evicted, unmatched: b.unmatched, labelOnly: b.labelOnly}
}

// encode writes the book: waiting answers in queue order, scheduled ones in
// order, logs sorted, scores, counters.
func (b *servedBook) encode(w *encoder) {
	w.int(b.due)
	for _, a := range b.queue[b.head:] {
		if !a.done {
			encodeAnswer(w, a)
		}
	}
	w.int(len(b.sched))
	for _, a := range b.sched {
		encodeAnswer(w, a)
	}
	names := make([]string, 0, len(b.logs))
	for l := range b.logs {
		names = append(names, l)
	}
	slices.Sort(names)
	w.int(len(names))
	for _, l := range names {
		w.str(l)
		w.i64(b.logs[l])
	}
	w.i64(b.now)
	w.int(len(b.stats))
	for i := range b.stats {
		s := &b.stats[i]
		for _, v := range [...]int64{s.answers, s.labelled, s.intervals, s.covered, s.delayN} {
			w.i64(v)
		}
		for _, v := range [...]float64{s.sumAbs, s.sumSq, s.sumErr, s.width, s.fadAbs, s.fadSq, s.fadW, s.delaySum, s.delayMax} {
			w.f64(v)
		}
		for _, n := range s.buckets {
			w.i64(n)
		}
	}
	for _, v := range [...]int64{b.expired, b.evicted, b.unmatched, b.labelOnly} {
		w.i64(v)
	}
}

func (e *Engine) decodeBook(r *decoder, partition int32) *servedBook {
	b := newBook(len(e.cfg.Learners) + 1)
	n := r.count(1<<30, 40)
	for i := 0; i < n && r.err == nil; i++ {
		a := decodeAnswer(r)
		a.Partition = partition
		b.pending[a.ID] = a
		b.queue = append(b.queue, a)
	}
	b.due = len(b.queue)
	n = r.count(1<<30, 40)
	for i := 0; i < n && r.err == nil; i++ {
		a := decodeAnswer(r)
		a.Partition = partition
		b.sched = append(b.sched, a)
	}
	if r.err == nil && len(b.pending) != b.due {
		r.fail("served answers repeated")
	}
	n = r.count(1<<20, 12)
	for i := 0; i < n && r.err == nil; i++ {
		l := r.str(MaxNameBytes)
		b.logs[l] = r.i64()
	}
	b.now = r.i64()
	rows := len(e.cfg.Learners) + 1
	r.expect(rows, "served rows")
	for i := 0; i < rows && r.err == nil; i++ {
		s := &b.stats[i]
		s.answers, s.labelled, s.intervals, s.covered, s.delayN = r.i64(), r.i64(), r.i64(), r.i64(), r.i64()
		s.sumAbs, s.sumSq, s.sumErr, s.width, s.fadAbs, s.fadSq, s.fadW, s.delaySum, s.delayMax = r.f64(), r.f64(), r.f64(), r.f64(), r.f64(), r.f64(), r.f64(), r.f64(), r.f64()
		for j := range s.buckets {
			s.buckets[j] = r.i64()
		}
	}
	b.expired, b.evicted, b.unmatched, b.labelOnly = r.i64(), r.i64(), r.i64(), r.i64()
	for _, a := range b.queue {
		if a.Learner > len(e.cfg.Learners) {
			r.fail("served answer of an unknown learner")
		}
	}
	return b
}

func encodeAnswer(w *encoder, a *Answer) {
	w.str(a.ID)
	w.str(a.Key)
	w.u32(uint32(a.Learner))
	w.f64(a.Value)
	w.bool(a.HasInterval)
	w.f64(a.Low)
	w.f64(a.High)
	w.bool(a.HasAt)
	w.i64(a.At)
	w.i64(a.After)
	w.str(a.Log)
	w.i64(a.Seq)
}

func decodeAnswer(r *decoder) *Answer {
	a := &Answer{ID: r.str(MaxAnswerIDBytes), Key: r.str(MaxKeyBytes), Learner: int(r.u32()), Value: r.f64()}
	a.HasInterval, a.Low, a.High = r.bool(), r.f64(), r.f64()
	a.HasAt, a.At, a.After = r.bool(), r.i64(), r.i64()
	a.Log, a.Seq = r.str(MaxNameBytes), r.i64()
	return a
}
