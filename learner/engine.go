package learner

import (
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"hash/maphash"
	"math"
	"slices"
	"strings"
	"sync/atomic"
	"unsafe"
)

// DefaultMaxKeys is the cap on distinct keys when Config.MaxKeys is zero:
// a safeguard against a runaway key space, far above what one machine is
// expected to hold of light learners (10⁶ keys of rls + mean take about
// 1.8 GB). What protects memory is the memory budget (Config.MemoryBudget).
const DefaultMaxKeys = 10_000_000

// Position is where an event sits in its stream: a partition and an offset
// within it (a Kafka partition and offset; a journal's sequence number; a
// history file's line number, partition 0). It is the only clock of the
// engine's state.
type Position struct {
	Partition int32 `json:"partition"`
	Offset    int64 `json:"offset"`
}

func (p Position) String() string { return fmt.Sprintf("%d:%d", p.Partition, p.Offset) }

// Config configures an Engine.
type Config struct {
	Learners []Spec        // at least one; names unique
	Features FeatureConfig // schema, hashing, time features
	MaxKeys  int           // distinct keys; events for new keys beyond it are rejected. Default: DefaultMaxKeys.
	// MemoryBudget, when positive, is the most the model state may hold, in
	// bytes as estimated from what the learners hold (StateBytes; windows
	// and coefficients, not their allocations): an event of a new key is
	// rejected while the estimate is at or past it, and keys already there
	// go on learning (their windows may still grow to their bounds). 0: no
	// budget. The estimate is deterministic, so a restart refuses the same
	// keys; the process's memory runs about 1.0–1.5× the estimate.
	MemoryBudget int64
	Score        ScoreConfig
	Drift        DriftConfig
	Leader       LeaderConfig
	Served       ServedConfig
}

// Validate reports every problem with c at once. It changes nothing.
func (c *Config) Validate() error {
	var errs []error
	if len(c.Learners) == 0 {
		errs = append(errs, fmt.Errorf("%w: no learner configured; give at least one spec", ErrInvalidSpec))
	}
	seen := map[string]bool{}
	for _, s := range c.Learners {
		if seen[s.Name] {
			errs = append(errs, fmt.Errorf("%w: two learners are named %q; rename one with name=", ErrInvalidSpec, s.Name))
		}
		seen[s.Name] = true
	}
	if c.MaxKeys < 0 {
		errs = append(errs, fmt.Errorf("%w: max keys %d is negative", ErrInvalidSpec, c.MaxKeys))
	}
	if c.MemoryBudget < 0 {
		errs = append(errs, fmt.Errorf("%w: memory budget %d is negative", ErrInvalidSpec, c.MemoryBudget))
	}
	if c.Features.HashBuckets < 0 || c.Features.HashBuckets > 1<<16 {
		errs = append(errs, fmt.Errorf("%w: hash buckets %d: want 1 to 65536", ErrInvalidSpec, c.Features.HashBuckets))
	}
	if _, _, err := NewSchema(c.Features); err != nil {
		errs = append(errs, err)
	}
	if m := c.Drift.Method; m != "" && m != DriftPageHinkley && m != DriftADWIN {
		errs = append(errs, fmt.Errorf("%w: drift method %q: want %s or %s", ErrInvalidSpec, m, DriftPageHinkley, DriftADWIN))
	}
	return errors.Join(errs...)
}

// Alarm is where a drift alarm fired.
type Alarm struct {
	Position Position `json:"position"`
	Key      string   `json:"key"`
	Time     int64    `json:"-"`
}

// Engine applies each event to every learner of its key — predict, score,
// train — and keeps the prequential scores, drift watch and stream positions.
// Its state after events 1..n is a pure function of (Config, events 1..n):
// it reads no clock and iterates no map where order matters.
//
// Each distinct key gets its own learners on first sight. The engine keeps a
// high-water mark per partition and ignores an event whose position the state
// already covers, so a source that delivers at least once is applied exactly
// once.
//
// An Engine is not safe for concurrent use: one goroutine owns it; readers
// work on a copy (Decode the bytes of Encode into a new Engine).
type Engine struct {
	cfg      Config
	schema   *Schema
	needTime string // the first learner that needs event time, or ""
	baseline int    // index of the first mean learner, or −1
	keys     keyIndex
	byName   []*keyState // the same; byName[:sorted] sorted by key, later ones in arrival order (see ordered)
	sorted   int

	// Publishing (see Publish): once an engine has published, its keys are
	// also in a persistent trie, and a key published in an earlier epoch is
	// copied before it changes. A published engine is frozen: it has the
	// trie and no map.
	seed       maphash.Seed
	root       *trieNode
	epoch      uint64
	publishing bool
	frozen     bool
	nkeys      int // keys of a frozen engine

	// Recycling (recycle.go): the registry of published copies still held;
	// a copy's holds and epoch; the live engine's replaced versions by
	// epoch, and those no held copy shows.
	views     *views
	holds     *atomic.Int32 // of a published copy
	viewEpoch uint64
	recycling bool
	retired   []retiredList
	spares    []*keyState
	nodes     *nodePool // the trie's, when recycling

	sink    float64                      // what Prefetch read, kept so that its reads stay
	ahead   [PrefetchAhead - 1]*keyState // the entries Prefetch found at its last calls, newest first
	keyBase int64                        // estimated bytes of the keys themselves (keyBase), summed; the learners' are in totals
	totals  []total
	parts   map[int32]*part // per stream partition: high-water mark and counters

	applied, rejected, duplicates, ignored int64
	alarms, skipped                        int64

	x       []float64
	scratch []*scratch   // per learner: working space its keys share
	drift   *DriftConfig // e.cfg.Drift, shared by every key's detectors

	stateVer uint32 // while decoding: the version of the state being read

	intervals     intervalConfig      // the prediction intervals' settings (Scorer)
	lead          leadTotals          // the keys' leaders (Config.Leader)
	served        ServedConfig        // e.cfg.Served with its defaults
	waiting       map[int32][]*Answer // served answers of partitions not held yet (Serve)
	servedChanges int64               // answers registered and labels seen (ServedChanges)

	lastPred []float64 // each learner's prediction for the last applied event
	lastOK   []bool    // whether it predicted (was ready)
}

// total is what a learner keeps across keys, as running totals brought up
// to date by every event, so that a report reads them instead of visiting
// every key: its pooled scorers, how many keys are in each drift state, the
// late events of its time windows, its alarm count and the last alarm, "last"
// meaning the latest by (event time, partition, offset), so that it does not
// depend on how partitions interleave. None of it is in the state bytes: a
// decoded engine adds its keys up again.
type total struct {
	pool      pool
	states    [Drift + 1]int64 // keys per drift state
	late      int64
	held      int64 // estimated bytes of this learner's slots over all keys
	alarms    int64
	lastAlarm *Alarm
}

// count adds (sign 1) or takes out (−1) learner i of ks from the totals.
func (t *total) count(ks *keyState, i int, sign int64) {
	if sign > 0 {
		t.pool.add(&ks.slots[i].score)
	} else {
		t.pool.remove(&ks.slots[i].score)
	}
	t.states[ks.slots[i].drift.State()] += sign
	if sign > 0 {
		ks.slots[i].held = slotHeld(&ks.slots[i])
	}
	t.held += sign * ks.slots[i].held
	if l, ok := ks.slots[i].learner.(lateCounter); ok {
		t.late += sign * l.Late()
	}
}

// later reports whether alarm a comes after b in (time, partition, offset) order.
func (a Alarm) later(b Alarm) bool {
	if a.Time != b.Time {
		return a.Time > b.Time
	}
	if a.Position.Partition != b.Position.Partition {
		return a.Position.Partition > b.Position.Partition
	}
	return a.Position.Offset > b.Position.Offset
}

type keyState struct {
	lead      *leader // the key's leader (Config.Leader); nil without one
	key       string
	partition int32
	slots     []slot // one per learner, in configuration order
	hash      uint64 // of key, with the engine's seed (the trie's path)
	epoch     uint64 // the publish epoch it was made in: changed in place only in that one
	idx       int    // its place in Engine.byName
}

// slot is one learner of a key with its scorer and drift detector, together
// in one allocation with the key's other slots.
type slot struct {
	learner Learner
	score   Scorer
	drift   PageHinkley
	held    int64 // its estimated bytes (slotHeld) when last counted
}

// NewEngine validates cfg, fills its defaults and returns an empty engine.
func NewEngine(cfg Config) (*Engine, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	if cfg.MaxKeys == 0 {
		cfg.MaxKeys = DefaultMaxKeys
	}
	cfg.Score = cfg.Score.withDefaults()
	cfg.Drift = cfg.Drift.withDefaults()
	cfg.Leader = cfg.Leader.withDefaults()
	e := &Engine{cfg: cfg, baseline: -1, keys: newKeyIndex(0), parts: map[int32]*part{}, seed: maphash.MakeSeed(),
		intervals: newIntervalConfig(cfg.Score.Level, cfg.Score.ConformalStep), lead: leadTotals{pool: pool{alpha: cfg.Score.Fading, level: cfg.Score.Level}}}
	e.drift = &e.cfg.Drift
	e.served = cfg.Served.withDefaults()
	e.schema, _, _ = NewSchema(cfg.Features)
	for i := range cfg.Learners {
		s := &cfg.Learners[i]
		if s.NeedsTime() && e.needTime == "" {
			e.needTime = s.Name
		}
		if s.Kind == KindMean && e.baseline < 0 {
			e.baseline = i
		}
		e.totals = append(e.totals, total{pool: pool{alpha: cfg.Score.Fading, level: cfg.Score.Level}})
		e.lastPred = append(e.lastPred, 0)
		e.lastOK = append(e.lastOK, false)
		e.scratch = append(e.scratch, nil)
	}
	if cfg.Features.TimeFeatures && e.needTime == "" {
		e.needTime = "time features"
	}
	return e, nil
}

// Last returns learner i's prediction for the last event Apply applied, and
// whether it made one (it was ready). Replays use it to plot predictions.
func (e *Engine) Last(i int) (float64, bool) { return e.lastPred[i], e.lastOK[i] }

// Recent returns learner i's recent MAE and RMSE pooled over all keys (nil
// before any scored event) and how many recent errors they cover, from the
// running totals: the figures a report gives, at the cost of two roundings.
func (e *Engine) Recent(i int) (events int64, mae, rmse *float64) { return e.totals[i].pool.recent() }

// LearnerAlarms returns the drift alarms learner i has raised, over all keys.
func (e *Engine) LearnerAlarms(i int) int64 { return e.totals[i].alarms }

// Config returns the engine's configuration with defaults filled in.
func (e *Engine) Config() Config { return e.cfg }

// Schema returns the feature schema, or nil before the first valid event.
func (e *Engine) Schema() *Schema { return e.schema }

// Applied returns the number of events trained on.
func (e *Engine) Applied() int64 { return e.applied }

// Rejected returns the number of events refused (by Apply or Skip).
func (e *Engine) Rejected() int64 { return e.rejected }

// Alarms returns the number of drift alarms raised so far, over all learners
// and keys; a caller that compares it before and after Apply learns that the
// event raised one.
func (e *Engine) Alarms() int64 { return e.alarms }

// Covers reports whether the state already covers pos.
func (e *Engine) Covers(pos Position) bool {
	p := e.parts[pos.Partition]
	return p != nil && pos.Offset <= p.hwm
}

// at returns the part of pos's partition, made when new, with pos covered.
func (e *Engine) at(pos Position) *part {
	p := e.parts[pos.Partition]
	if p == nil {
		p = newPart(len(e.cfg.Learners))
		e.parts[pos.Partition] = p
		p.hwm = pos.Offset - 1 // answers kept for it register before or after this event
		e.adoptWaiting(pos.Partition)
	}
	p.hwm = pos.Offset
	return p
}

// Positions returns the high-water mark of every partition seen, sorted by partition.
func (e *Engine) Positions() []Position {
	out := make([]Position, 0, len(e.parts))
	for n, p := range e.parts {
		out = append(out, Position{n, p.hwm})
	}
	slices.SortFunc(out, func(a, b Position) int { return int(a.Partition) - int(b.Partition) })
	return out
}

// Skip records that the event at pos was refused before it reached the engine
// (it did not decode): the position is covered and the event counted as
// rejected. A position already covered is ignored.
func (e *Engine) Skip(pos Position) {
	if e.Covers(pos) {
		return
	}
	p := e.at(pos)
	e.beforeEvent(p, pos.Offset)
	p.rejected++
	e.rejected++
}

// Apply applies the event at pos: for every learner of its key, predict,
// score the prediction against the target, then train. It returns false with
// a nil error when the state already covers pos (a redelivery), and false with
// an error wrapping ErrRejected when the event does not fit (a schema feature
// missing or mistyped, no time where one is needed, a new key past the cap);
// a rejected event is counted, covers its position, and trains nothing. ev
// must have passed DecodeEvent or ValidateEvent.
//
// Apply allocates nothing for an event of a known key once the schema is set.
func (e *Engine) Apply(pos Position, ev *Event) (bool, error) {
	if e.frozen {
		panic("learner: Apply on a published engine")
	}
	p := e.parts[pos.Partition]
	if p != nil && pos.Offset <= p.hwm {
		e.duplicates++
		p.duplicates++
		return false, nil
	}
	if p == nil {
		p = e.at(pos)
	}
	p.hwm = pos.Offset
	e.beforeEvent(p, pos.Offset)
	if ev.LabelOnly {
		e.book(p).labelOnly++
		e.servedEvent(p, ev)
		return true, nil
	}
	schema := e.schema
	if schema == nil {
		schema = SchemaOf(ev, e.cfg.Features)
	}
	if len(e.x) != schema.Dim() {
		e.x = make([]float64, schema.Dim())
	}
	ignored, err := schema.Vector(e.x, ev)
	if err != nil {
		e.rejected++
		p.rejected++
		return false, err
	}
	if e.needTime != "" && !ev.HasTime {
		e.rejected++
		p.rejected++
		return false, reject(RejectTime, "time is missing and %s needs it", e.needTime)
	}
	h := maphash.String(e.seed, ev.Key)
	ks := e.keys.get(ev.Key, h)
	if ks == nil {
		if e.keys.len() >= e.cfg.MaxKeys {
			e.rejected++
			p.rejected++
			return false, reject(RejectKeyCap, "key %q would be key number %d, past the cap of %d", truncate(ev.Key), e.keys.len()+1, e.cfg.MaxKeys)
		}
		if err := e.overBudget(ev.Key); err != nil {
			e.rejected++
			p.rejected++
			return false, err
		}
		e.schema = schema
		ks = e.newKey(ev.Key, h, pos.Partition)
		e.addKey(ks)
	} else if ks.epoch != e.epoch {
		ks = e.own(ks)
	}
	e.schema = schema
	e.ignored += int64(ignored)
	p.ignored += int64(ignored)
	y := ev.Target
	for i := range ks.slots {
		l := ks.slots[i].learner
		t := &e.totals[i]
		lc, windowed := l.(lateCounter)
		var late int64
		if windowed {
			late = lc.Late()
		}
		if ev.HasTime {
			l.Advance(ev.Time)
		}
		pred, ok := l.Predict(e.x)
		e.lastPred[i], e.lastOK[i] = pred, ok
		if ok {
			sc, d := &ks.slots[i].score, &ks.slots[i].drift
			t.pool.remove(sc)
			sc.score(y, pred, &e.intervals)
			t.pool.add(sc)
			before := d.State()
			alarm := d.Add(math.Abs(y - pred))
			if after := d.State(); after != before {
				t.states[before]--
				t.states[after]++
			}
			if alarm {
				e.alarms++
				t.alarms++
				p.alarms++
				p.learnerAlarms[i]++
				a := Alarm{Position: pos, Key: ks.key, Time: ev.Time}
				t.lastAlarm = laterAlarm(t.lastAlarm, a)
				p.last[i] = laterAlarm(p.last[i], a)
			}
		} else {
			ks.slots[i].score.Unscore()
			t.pool.unscored++
		}
		l.Learn(e.x, y, ev.Time)
		if windowed {
			t.late += lc.Late() - late
		}
		held := slotHeld(&ks.slots[i])
		t.held += held - ks.slots[i].held
		ks.slots[i].held = held
	}
	if e.cfg.Leader.On {
		e.stepLeader(ks, y)
	}
	e.applied++
	p.applied++
	if ev.HasTime {
		p.times.add(ev.Time)
	}
	if p.served != nil || ev.AnswerID != "" {
		e.servedEvent(p, ev)
	}
	return true, nil
}

// laterAlarm returns the later of *last (nil: none) and a, in last's storage
// when it has some.
func laterAlarm(last *Alarm, a Alarm) *Alarm {
	switch {
	case last == nil:
		return &a
	case a.later(*last):
		*last = a
	}
	return last
}

func (e *Engine) newKey(key string, h uint64, partition int32) *keyState {
	ks := allocKey(len(e.cfg.Learners))
	ks.key, ks.partition, ks.hash, ks.epoch = key, partition, h, e.epoch
	d := e.schema.Dim()
	for i := range e.cfg.Learners {
		ks.slots[i].learner = newShared(&e.cfg.Learners[i], d, &e.scratch[i])
		ks.slots[i].score = newScorer(e.cfg.Score.Recent, e.cfg.Score.Fading)
		ks.slots[i].drift = newPageHinkleyShared(e.drift)
	}
	return ks
}

// allocKey returns an empty key state with n slots, in one allocation
// with them for up to four learners: a key's header and its slots then
// share cache lines, and a million keys are a million objects fewer.
func allocKey(n int) *keyState {
	switch n {
	case 1:
		return allocWith(func(a *[1]slot) []slot { return a[:] })
	case 2:
		return allocWith(func(a *[2]slot) []slot { return a[:] })
	case 3:
		return allocWith(func(a *[3]slot) []slot { return a[:] })
	case 4:
		return allocWith(func(a *[4]slot) []slot { return a[:] })
	}
	return &keyState{slots: make([]slot, n)}
}

// allocWith allocates a key state followed by the slot array A.
func allocWith[A any](slots func(*A) []slot) *keyState {
	b := new(struct {
		ks keyState
		s  A
	})
	b.ks.slots = slots(&b.s)
	return &b.ks
}

// Prediction is the answer of one learner for one row.
type Prediction struct {
	Learner string // the learner that answered (the key's leader's name when LeaderName was asked)
	Value   float64
	Trained int64 // events this learner has trained on for the key
	Scored  int64 // of those, events it was scored on (prequentially)
	// RecentRMSE is the learner's RMSE over the key's recent scored events,
	// nil before any; services derive an approximate interval from it.
	RecentRMSE *float64
	// Normal and Conformal are the half-widths of the intervals the two
	// methods quote for this key at ScoreConfig.Level (Scorer), nil until
	// the key has MinIntervalEvents recent errors.
	Normal, Conformal *float64
	Level             float64
}

// Predict answers for one row of features of the given key with the named
// learner, without changing any state: it uses scratch space of its own, so
// that any number of goroutines may predict at once from an engine nobody
// is changing (a published copy). The row's features are matched against
// the schema as in Apply (the target is ignored).
func (e *Engine) Predict(key, learner string, ev *Event) (Prediction, error) {
	ks := e.lookup(key)
	if learner == LeaderName && e.cfg.Leader.On {
		if ks == nil || ks.lead == nil || ks.lead.current < 0 {
			return Prediction{}, fmt.Errorf("%w: no learner has %d recent errors on key %q yet, so none leads", ErrNotReady, MinIntervalEvents, key)
		}
		learner = e.cfg.Learners[ks.lead.current].Name
	}
	i := slices.IndexFunc(e.cfg.Learners, func(s Spec) bool { return s.Name == learner })
	if i < 0 {
		hint := ""
		if learner == LeaderName {
			hint = "; the per-key leader is kept only when the engine is told to (--leader)"
		}
		return Prediction{}, fmt.Errorf("%w: %q (configured: %s)%s", ErrUnknownLearner, learner, e.cfg.Names(), hint)
	}
	if ks == nil || e.schema == nil {
		return Prediction{}, fmt.Errorf("%w: key %q has no events yet", ErrUnknownKey, key)
	}
	x := make([]float64, e.schema.Dim())
	if _, err := e.schema.Vector(x, ev); err != nil {
		return Prediction{}, err
	}
	l := ks.slots[i].learner
	m := ks.slots[i].score.Metrics()
	p := Prediction{Learner: learner, Trained: l.Trained(), Scored: m.Scored, RecentRMSE: m.Recent.RMSE, Level: e.cfg.Score.Level}
	if sc := &ks.slots[i].score; sc.idx.Len() >= MinIntervalEvents && m.Recent.RMSE != nil {
		p.Normal, p.Conformal = ptr(normalZ(e.cfg.Score.Level)**m.Recent.RMSE), ptr(math.Max(sc.cq, 0))
	}
	// Predicting does not move a time window: only training does. A row's
	// time only feeds the time features.
	y, ok := l.predictShared(x)
	if !ok {
		return p, fmt.Errorf("%w: learner %q has trained on %d events of key %q", ErrNotReady, learner, l.Trained(), key)
	}
	p.Value = y
	return p, nil
}

// Names returns the learner names, comma-separated, for messages.
func (c Config) Names() string {
	var names []string
	for _, s := range c.Learners {
		names = append(names, s.Name)
	}
	return strings.Join(names, ", ")
}

// Pass covers pos without applying its event and without counting it as
// rejected: a restore that skips a bad burst passes over its events. The
// count is reported as skipped.
func (e *Engine) Pass(pos Position) {
	if e.Covers(pos) {
		return
	}
	p := e.at(pos)
	e.beforeEvent(p, pos.Offset)
	p.skipped++
	e.skipped++
}

// CoverUpTo raises each partition's high-water mark to the given position
// without applying anything: after restoring an older state, the events
// between it and ps are forgotten, not replayed (restore "from_now").
func (e *Engine) CoverUpTo(ps []Position) {
	for _, p := range ps {
		if !e.Covers(p) {
			e.beforeEvent(e.at(p), p.Offset+1)
		}
	}
}

// addKey registers a new key's state in O(1) amortised: the key order
// reports and state bytes need is produced when asked for (ordered).
func (e *Engine) addKey(ks *keyState) {
	e.keyBase += keyBase(ks)
	e.keys.set(ks)
	ks.idx = len(e.byName)
	e.byName = append(e.byName, ks)
	if e.publishing {
		e.root = e.root.with(ks, 0, e.epoch, e.nodes)
	}
	for i := range e.totals {
		e.totals[i].count(ks, i, 1)
	}
	e.countLead(ks, 1)
}

// keyBase estimates the bytes of a key apart from its learners: its state's
// header, its name and its entry in the engine's tables.
func keyBase(ks *keyState) int64 {
	return int64(unsafe.Sizeof(*ks)) + int64(len(ks.key)) + keyTableBytes
}

// slotHeld estimates the bytes of one learner of a key: the learner
// (Learner.held), its scorer with its recent errors, its drift detector.
func slotHeld(s *slot) int64 {
	return int64(unsafe.Sizeof(*s)) + 8*int64(s.score.idx.Len()) + s.learner.held()
}

// keyTableBytes is a key's share of the key map and list (common practice
// for a Go map of string to pointer: about 40 bytes an entry, plus 8 in the list).
const keyTableBytes = 48

// StateBytes returns the estimate of the bytes the state holds that
// Config.MemoryBudget is held to.
func (e *Engine) StateBytes() int64 {
	n := e.keyBase
	for i := range e.totals {
		n += e.totals[i].held
	}
	return n
}

// overBudget returns a rejection when a new key would pass the memory budget.
func (e *Engine) overBudget(key string) error {
	if b := e.cfg.MemoryBudget; b > 0 {
		if n := e.StateBytes(); n >= b {
			return reject(RejectMemory, "key %q is new and the state holds about %s, at its memory budget of %s: new keys are refused, "+
				"known ones go on learning; raise the memory budget to take more keys", truncate(key), bytesText(n), bytesText(b))
		}
	}
	return nil
}

// bytesText writes n bytes in binary units, for messages.
func bytesText(n int64) string {
	switch {
	case n >= 1<<30:
		return fmt.Sprintf("%.1f GiB", float64(n)/(1<<30))
	case n >= 1<<20:
		return fmt.Sprintf("%.1f MiB", float64(n)/(1<<20))
	case n >= 1<<10:
		return fmt.Sprintf("%.1f KiB", float64(n)/(1<<10))
	}
	return fmt.Sprintf("%d bytes", n)
}

// PrefetchAhead is how many events ahead of Apply a caller gives Prefetch
// the events it will apply.
const PrefetchAhead = 3

// Prefetch starts reading the state of ev's key into the cache, for a caller
// that knows which events come next: with a million keys an event's state is
// far from the cache, and an event waits on several reads that depend on one
// another (the key's entry, its state, its learners, their arrays). Prefetch
// does one step of that chain for each of the last PrefetchAhead events it
// was given (group prefetching, Chen, Ailamaki, Gibbons & Mowry 2004,
// "Improving hash join performance through prefetching", ICDE): this event's
// entry, the state of the one before, the learners and arrays of the one
// before that. The steps of different events do not wait on one another, so
// the processor has their reads in flight at once, beside the work of the
// event being applied. Call it with each event PrefetchAhead events before
// applying it. It only reads: given the wrong events, nothing changes but
// the time.
func (e *Engine) Prefetch(ev *Event) {
	if e.frozen {
		return
	}
	v := 0.0
	if ks := e.ahead[1]; ks != nil { // its learners and their arrays
		for i := range ks.slots {
			s := &ks.slots[i]
			v += s.learner.touch()
			if len(s.score.rec) > 0 {
				v += s.score.rec[0]
			}
		}
	}
	if ks := e.ahead[0]; ks != nil { // its state and name
		if len(ks.key) > 0 {
			v += float64(ks.key[0])
		}
		v += float64(len(ks.slots))
	}
	e.ahead[1] = e.ahead[0]
	e.ahead[0] = e.keys.byHash[maphash.String(e.seed, ev.Key)] // its entry (the name is compared by Apply)
	e.sink += v
}

// lookup returns the state of key, or nil.
func (e *Engine) lookup(key string) *keyState {
	if e.frozen {
		return e.root.get(key, maphash.String(e.seed, key))
	}
	return e.keys.get(key, maphash.String(e.seed, key))
}

// numKeys returns the number of keys.
func (e *Engine) numKeys() int {
	if e.frozen {
		return e.nkeys
	}
	return e.keys.len()
}

// ordered returns the key states sorted by key. Keys added since the last
// call are sorted among themselves and merged in: O(t log t + k) for t new
// keys among k, nothing when none is new. A published engine sorts a list
// of its own on every call (it is read by many goroutines and changes nothing).
func (e *Engine) ordered() []*keyState {
	if e.frozen {
		out := make([]*keyState, 0, e.nkeys)
		e.root.each(func(ks *keyState) { out = append(out, ks) })
		sortByKey(out)
		return out
	}
	if e.sorted == len(e.byName) {
		return e.byName
	}
	head, tail := e.byName[:e.sorted], slices.Clone(e.byName[e.sorted:])
	sortByKey(tail)
	merged := make([]*keyState, 0, len(e.byName))
	i, j := 0, 0
	for i < len(head) && j < len(tail) {
		if head[i].key < tail[j].key {
			merged = append(merged, head[i])
			i++
		} else {
			merged = append(merged, tail[j])
			j++
		}
	}
	merged = append(append(merged, head[i:]...), tail[j:]...)
	for i, ks := range merged {
		ks.idx = i
	}
	e.byName, e.sorted = merged, len(merged)
	return merged
}

// Publish returns a read-only copy of the engine as it is now, for readers
// on other goroutines (predictions, reports, validation): any number of them
// may use it at once while the engine goes on applying events. Its cost
// follows what changed since the last publish, not the size of the state:
// the copy shares every key's state with the engine, and the engine copies a
// key (copy-on-write) the first time it changes after a publish. The first
// publish lays the keys out in a persistent trie, once, in O(keys).
//
// Apply on the copy panics; so does Publish's copy being published again.
func (e *Engine) Publish() *Engine {
	if e.frozen {
		panic("learner: Publish on a published engine")
	}
	if !e.publishing {
		e.publishing = true
		for _, ks := range e.byName {
			ks.epoch = e.epoch
			e.root = e.root.with(ks, 0, e.epoch, e.nodes)
		}
	}
	v := &Engine{cfg: e.cfg, schema: e.schema, needTime: e.needTime, baseline: e.baseline,
		applied: e.applied, rejected: e.rejected, duplicates: e.duplicates, ignored: e.ignored, alarms: e.alarms, skipped: e.skipped,
		servedChanges: e.servedChanges, totals: slices.Clone(e.totals), parts: cloneParts(e.parts), lastPred: slices.Clone(e.lastPred), lastOK: slices.Clone(e.lastOK),
		scratch: make([]*scratch, len(e.scratch)), drift: e.drift,
		seed: e.seed, root: e.root, frozen: true, nkeys: e.keys.len(), keyBase: e.keyBase}
	for i := range v.totals {
		if a := v.totals[i].lastAlarm; a != nil {
			c := *a
			v.totals[i].lastAlarm = &c
		}
	}
	if e.views == nil {
		e.views = newViews()
	}
	if e.recycling && e.nodes == nil {
		e.nodes = &nodePool{views: e.views}
	}
	v.views, v.viewEpoch = e.views, e.epoch
	v.holds = new(atomic.Int32)
	v.holds.Store(1) // the publisher's
	e.views.add(e.epoch)
	e.epoch++ // what v holds is now frozen
	return v
}

// own returns a copy of ks that the engine may change: ks was published in
// an earlier epoch and is read by whoever holds that publish.
func (e *Engine) own(ks *keyState) *keyState {
	var c *keyState
	if e.recycling {
		e.retire(ks)
		c = e.spare()
	}
	if c != nil && len(c.slots) == len(ks.slots) {
		for i := range ks.slots {
			s, d := &ks.slots[i], &c.slots[i]
			d.learner = s.learner.cloneInto(d.learner)
			s.score.cloneInto(&d.score)
			d.drift, d.held = s.drift.clone(), s.held
		}
	} else {
		c = allocKey(len(ks.slots))
		for i := range ks.slots {
			s := &ks.slots[i]
			c.slots[i] = slot{learner: s.learner.clone(), score: s.score.clone(), drift: s.drift.clone(), held: s.held}
		}
	}
	c.key, c.partition, c.hash, c.epoch, c.idx = ks.key, ks.partition, ks.hash, e.epoch, ks.idx
	c.lead = ks.lead.clone()
	e.keys.set(c)
	e.byName[c.idx] = c
	e.root = e.root.with(c, 0, e.epoch, e.nodes)
	return c
}

// Digest returns the hex SHA-256 of a canonical description of the
// configuration (learner names and canonical specs, features, scoring and
// drift settings, defaults filled in). A checkpoint records it so that a
// resume under another configuration is refused. The capacity limits (key
// cap, memory budget) are not in it: they decide which new keys are taken,
// not what a state means, and an operator may raise them and resume.
func (c Config) Digest() string { return c.digest(false, 0) }

// Digests returns the digests a checkpoint of this configuration may carry:
// Digest, and those builds before the capacity limits left the digest
// wrote, with the key cap in it: the one configured, or the default of
// those builds, 10 000.
func (c Config) Digests() []string {
	out := []string{c.Digest(), c.digest(true, legacyMaxKeys)}
	if c.MaxKeys != 0 && c.MaxKeys != legacyMaxKeys && c.MaxKeys != DefaultMaxKeys {
		out = append(out, c.digest(true, c.MaxKeys))
	}
	return out
}

// legacyMaxKeys was DefaultMaxKeys while the key cap was in the digest.
const legacyMaxKeys = 10_000

func (c Config) digest(withCap bool, maxKeys int) string {
	c.Score = c.Score.withDefaults()
	c.Drift = c.Drift.withDefaults()
	c.Leader = c.Leader.withDefaults()
	h := sha256.New()
	for _, s := range c.Learners {
		fmt.Fprintf(h, "learner %q %s\n", s.Name, s.Canonical())
	}
	f := c.Features
	fmt.Fprintf(h, "numeric %q\ncategorical %q\nbuckets %d\ntime %t\n", f.Numeric, f.Categorical, bucketsOf(f), f.TimeFeatures)
	if withCap {
		fmt.Fprintf(h, "max_keys %d\n", maxKeys)
	}
	fmt.Fprintf(h, "score %d %g\ndrift %g %g %d %t\n", c.Score.Recent, c.Score.Fading,
		c.Drift.Delta, c.Drift.Lambda, c.Drift.MinEvents, c.Drift.Raw)
	if c.Leader.On {
		fmt.Fprintf(h, "leader %g\n", c.Leader.Margin)
	}
	if c.Drift.Method != DriftPageHinkley {
		fmt.Fprintf(h, "drift method %s %g\n", c.Drift.Method, c.Drift.ADWINDelta)
	}
	if c.Score.Level != DefaultLevel || c.Score.ConformalStep != DefaultConformalStep {
		// Only other than the defaults, so that checkpoints from before
		// the intervals had settings still load.
		fmt.Fprintf(h, "intervals %g %g\n", c.Score.Level, c.Score.ConformalStep)
	}
	return hex.EncodeToString(h.Sum(nil))
}
