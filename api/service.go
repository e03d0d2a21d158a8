package api

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Service is tidemark running: one goroutine (the loop) owns the engine and
// applies events from the intake in position order; HTTP handlers read
// snapshots the loop publishes and send it commands (take a checkpoint,
// restore one). Shutdown order: stop HTTP intake, stop the source, take a
// shutdown checkpoint, commit offsets, close.
type Service struct {
	cfg     Config
	eng     *learner.Engine // the loop's alone
	store   *checkpoint.Store
	src     intake.Source   // where events come from
	journal intake.Appender // the source, when it takes events over HTTP; else nil
	dead    *deadLetters
	metrics *metrics
	http    *http.Server

	snap  atomic.Pointer[snapshot]
	cmds  chan command
	ready atomic.Bool
	fault atomic.Pointer[fault] // what stopped intake, or nil

	// loop state
	lastCk     checkpoint.Info
	sinceCk    int64
	lastCkTime time.Time
	skip       *skipRule
	caughtUp   []learner.Position // ready once the engine covers these
	curves     *curves
	lastAlarms int64
	generation int
	published  int64
	sourceStop context.CancelFunc
	items      chan item
	sourceDone chan struct{}
	sourceMu   sync.Mutex
	availKnown bool // the source has said what it holds (Kafka: once the brokers answered)

	addr        string
	dataDir     string // absolute, to keep it out of error answers
	listening   chan struct{}
	ckPositions map[uint64][]learner.Position // positions each known checkpoint covers
	handled     atomic.Int64                  // events the loop has handled (applied, rejected or passed) since start
}

// Handled returns how many events the loop has handled since start, read
// without waiting for a snapshot (benchmarks poll it).
func (s *Service) Handled() int64 { return s.handled.Load() }

// Addr waits until Run listens and returns the address it listens on, or ""
// when Run failed before it could listen.
func (s *Service) Addr() string {
	<-s.listening
	return s.addr
}

// item is one event handed from a source to the loop, decoded by the
// source's goroutine so that decoding overlaps learning.
type item struct {
	gen    int
	pos    learner.Position
	data   []byte         // as received, for the dead-letter file
	ev     *learner.Event // from eventPool; nil when decoding failed
	decErr error
}

// eventPool recycles decoded events between the sources and the loop.
var eventPool = sync.Pool{New: func() any { return new(learner.Event) }}

func decodeItem(it *item) {
	ev := eventPool.Get().(*learner.Event)
	if err := learner.DecodeEvent(it.data, ev); err != nil {
		eventPool.Put(ev)
		it.decErr = err
		return
	}
	it.ev = ev
}

// New opens the data directory, restores the newest good checkpoint and
// prepares the HTTP server; Run starts it.
func New(cfg Config) (*Service, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg.setDefaults()
	if err := privateDir(cfg.DataDir, cfg.Log); err != nil {
		return nil, err
	}
	eng, err := learner.NewEngine(cfg.Engine)
	if err != nil {
		return nil, err
	}
	s := &Service{cfg: cfg, eng: eng, cmds: make(chan command), curves: newCurves(cfg.Engine.Learners, cfg.CurvePoints),
		listening: make(chan struct{}), ckPositions: map[uint64][]learner.Position{}}
	s.dataDir, _ = filepath.Abs(cfg.DataDir)
	s.store, err = checkpoint.OpenStore(checkpoint.StoreConfig{Dir: filepath.Join(cfg.DataDir, "checkpoints"), Retain: cfg.Retain, FS: cfg.CheckpointFS})
	if err != nil {
		return nil, err
	}
	s.dead, err = openDeadLetters(filepath.Join(cfg.DataDir, "deadletters.ndjson"), cfg.DeadLetterBytes)
	if err != nil {
		s.store.Close()
		return nil, err
	}
	if s.src, err = openSource(cfg); err != nil {
		s.close()
		return nil, err
	}
	s.journal, _ = s.src.(intake.Appender)
	if err := s.restoreLatest(); err != nil {
		s.close()
		return nil, err
	}
	s.metrics = newMetrics(s)
	s.http = s.newHTTP()
	s.publish()
	return s, nil
}

// openSource opens the configured source of events: a Kafka topic, a
// history file, or (by default) the journal in the data directory.
func openSource(cfg Config) (intake.Source, error) {
	switch {
	case cfg.Kafka != nil:
		kc := *cfg.Kafka
		if kc.Log == nil {
			kc.Log = cfg.Log
		}
		k, err := intake.NewKafka(kc)
		if err != nil {
			return nil, err
		}
		ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		defer cancel()
		if err := k.Refresh(ctx); err != nil {
			cfg.Log.Warn("kafka: cannot read the topic's offsets yet; not ready until it can", "error", err)
		}
		return k, nil
	case cfg.History != "":
		return intake.OpenHistorySource(cfg.History)
	}
	return intake.OpenJournal(intake.JournalConfig{Dir: filepath.Join(cfg.DataDir, "journal"),
		SegmentBytes: cfg.JournalSegmentBytes, Log: logWriter{cfg.Log}, File: cfg.JournalFile})
}

// privateDir creates dir 0700, or makes an existing one 0700 (with its
// journal and checkpoints subdirectories), saying so; it refuses a directory
// it cannot make private.
func privateDir(dir string, log *slog.Logger) error {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return fmt.Errorf("data directory: %w", err)
	}
	for _, d := range []string{dir, filepath.Join(dir, "journal"), filepath.Join(dir, "checkpoints")} {
		st, err := os.Stat(d)
		if errors.Is(err, fs.ErrNotExist) && d != dir {
			continue
		}
		if err != nil {
			return fmt.Errorf("data directory: %w", err)
		}
		if !st.IsDir() {
			return fmt.Errorf("data directory: %s is not a directory", d)
		}
		if perm := st.Mode().Perm(); perm&0o077 != 0 {
			if err := os.Chmod(d, 0o700); err != nil {
				return fmt.Errorf("data directory: %s is readable by other users (mode %v) and could not be made private: %w", d, perm, err)
			}
			log.Warn("data directory was readable by other users; made it private (0700)", "dir", d, "was", perm.String())
		}
	}
	return nil
}

func (s *Service) close() {
	if s.src != nil {
		s.src.Close()
	}
	if s.dead != nil {
		s.dead.Close()
	}
	if s.store != nil {
		s.store.Close()
	}
}

// serviceSource is the manifest's record of what the service was doing.
type serviceSource struct {
	Kind string    `json:"kind"` // "service"
	Skip *skipRule `json:"skip,omitempty"`
}

// restoreLatest loads the newest good checkpoint at start.
func (s *Service) restoreLatest() error {
	c, skipped, err := persist.Newest(s.store)
	for _, e := range skipped {
		s.cfg.Log.Warn("skipping a checkpoint that fails its checks", "error", e)
	}
	if err == nil && c == nil {
		s.cfg.Log.Info("no checkpoint yet; starting from the beginning of the stream")
		s.lastCkTime = time.Now()
		s.setCatchUp()
		return nil
	}
	if err != nil {
		return err
	}
	if err := s.adopt(c); err != nil {
		return err
	}
	var src serviceSource
	if json.Unmarshal(c.Manifest.Source, &src) == nil && src.Skip != nil {
		s.skip = src.Skip
	}
	s.lastCk = c.Info
	s.lastCkTime = c.Manifest.Created
	s.cfg.Log.Info("restored checkpoint", "version", c.Manifest.Version, "events", c.Manifest.Events, "position", positionsText(c.Manifest.Positions))
	s.setCatchUp()
	return nil
}

// adopt decodes checkpoint c into the engine after checking its configuration.
func (s *Service) adopt(c *checkpoint.Checkpoint) error {
	if err := s.decodeInto(s.eng, c); err != nil {
		return err
	}
	s.lastAlarms = s.eng.Alarms()
	return nil
}

// decodeInto decodes checkpoint c into eng after checking its configuration.
func (s *Service) decodeInto(eng *learner.Engine, c *checkpoint.Checkpoint) error {
	return persist.Adopt(eng, c, "start with the same settings, or point --data at another directory")
}

// setCatchUp records the positions the engine must reach to be ready: what
// the source holds now.
func (s *Service) setCatchUp() {
	s.ready.Store(false)
	s.caughtUp, s.availKnown = s.src.Available()
	if s.availKnown {
		s.checkReady()
	}
}

// refreshCatchUp learns what the source holds once it can say (Kafka: once
// the brokers answer), then checks readiness.
func (s *Service) refreshCatchUp() {
	if !s.availKnown {
		s.caughtUp, s.availKnown = s.src.Available()
	}
	if s.availKnown {
		s.checkReady()
	}
}

func (s *Service) checkReady() {
	if s.ready.Load() {
		return
	}
	for _, p := range s.caughtUp {
		if !s.eng.Covers(p) {
			return
		}
	}
	s.ready.Store(true)
	s.cfg.Log.Info("ready: caught up with the stream", "events", s.eng.Applied())
}

// Run serves HTTP and runs the loop until ctx is done, then shuts down in
// order and returns nil after a clean shutdown.
func (s *Service) Run(ctx context.Context) error {
	defer s.close()
	ln, err := net.Listen("tcp", s.cfg.Listen)
	if err != nil {
		close(s.listening) // Addr returns "": Run failed before listening
		return fmt.Errorf("http: %w (choose another address with --listen)", err)
	}
	s.addr = ln.Addr().String()
	close(s.listening)
	srvErr := make(chan error, 1)
	go func() {
		var err error
		if s.cfg.TLSCert != "" {
			s.cfg.Log.Info("listening (HTTPS)", "address", s.addr)
			err = s.http.ServeTLS(ln, s.cfg.TLSCert, s.cfg.TLSKey)
		} else {
			s.cfg.Log.Info("listening", "address", s.addr)
			err = s.http.Serve(ln)
		}
		if !errors.Is(err, http.ErrServerClosed) {
			srvErr <- err
		}
		close(srvErr)
	}()
	loopCtx, stopLoop := context.WithCancel(context.Background())
	defer stopLoop()
	loopErr := make(chan error, 1)
	go func() { loopErr <- s.loop(loopCtx) }()
	select {
	case <-ctx.Done():
	case err = <-srvErr:
		err = fmt.Errorf("http: %w", err)
	case err = <-loopErr:
		loopErr = nil
	}
	// 1. stop taking events over HTTP (requests in flight finish: their
	// events are durable before they are acknowledged)
	sctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	s.http.Shutdown(sctx)
	// 2. stop the loop and its source, 3. shutdown checkpoint, 4. commit
	if loopErr != nil {
		stopLoop()
		if lerr := <-loopErr; lerr != nil && !errors.Is(lerr, context.Canceled) {
			err = errors.Join(err, lerr)
		}
	}
	s.stopSource()
	if cerr := s.checkpoint(checkpoint.Shutdown, 0); cerr != nil {
		err = errors.Join(err, fmt.Errorf("shutdown checkpoint: %w", cerr))
	}
	s.cfg.Log.Info("stopped", "events", s.eng.Applied(), "checkpoint", s.lastCk.Version)
	return err
}

// Handler returns the HTTP handler, for tests that serve it themselves.
func (s *Service) Handler() http.Handler { return s.http.Handler }

// startSource starts reading the stream after the positions the engine covers.
func (s *Service) startSource() {
	s.stopSource()
	s.generation++
	gen := s.generation
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	s.sourceMu.Lock()
	s.sourceStop, s.sourceDone = cancel, done
	s.sourceMu.Unlock()
	items := s.items
	go func() {
		defer close(done)
		err := s.src.Run(ctx, s.eng.Positions(), func(pos learner.Position, value []byte) bool {
			it := item{gen: gen, pos: pos, data: value}
			decodeItem(&it)
			select {
			case items <- it:
				return true
			case <-ctx.Done():
				return false
			}
		})
		if err == nil || ctx.Err() != nil {
			return
		}
		var d *intake.DamageError
		switch {
		case errors.As(err, &d):
			s.damaged(d)
		case errors.Is(err, intake.ErrJournalCorrupt):
			s.setFault(&fault{kind: faultDamage, message: fmt.Sprintf("the journal cannot be read: %v. Intake has stopped and new events are refused; "+
				"put back the journal's files and restart", err)})
		default:
			s.setFault(&fault{kind: faultSource, message: fmt.Sprintf("intake from %v stopped: %v; restart the service once the cause is fixed", s.src, err)})
		}
	}()
}

func (s *Service) stopSource() {
	s.sourceMu.Lock()
	stop, done := s.sourceStop, s.sourceDone
	s.sourceStop, s.sourceDone = nil, nil
	s.sourceMu.Unlock()
	if stop != nil {
		stop()
		<-done
	}
}

// loop owns the engine.
func (s *Service) loop(ctx context.Context) error {
	s.items = make(chan item, 1024)
	s.startSource()
	tick := time.NewTicker(s.cfg.PublishEvery)
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case it := <-s.items:
			if it.gen != s.generation {
				continue // read before a restore moved the position
			}
			s.apply(it)
			if it.ev != nil {
				eventPool.Put(it.ev)
			}
			if s.sinceCk >= s.cfg.CheckpointEvery {
				if err := s.checkpoint(checkpoint.Periodic, 0); err != nil {
					s.cfg.Log.Error("periodic checkpoint failed; will retry", "error", err)
					s.sinceCk = 0
				}
			}
		case cmd := <-s.cmds:
			cmd.reply <- cmd.run(s)
		case <-tick.C:
			if s.fault.Load() == nil {
				s.vanished(s.src.Health())
			}
			if s.sinceCk > 0 && time.Since(s.lastCkTime) >= s.cfg.CheckpointInterval {
				if err := s.checkpoint(checkpoint.Periodic, 0); err != nil {
					s.cfg.Log.Error("timed checkpoint failed; will retry", "error", err)
				}
			}
			s.refreshCatchUp()
			s.publish()
		}
	}
}

// apply runs one event through the engine (or past it, for a skip rule).
func (s *Service) apply(it item) {
	if s.eng.Covers(it.pos) {
		s.eng.Apply(it.pos, &learner.Event{}) // counts the redelivery; changes nothing else
		return
	}
	defer s.checkReady()
	if s.skip != nil && s.skip.coversPosition(it.pos) {
		s.eng.Pass(it.pos)
		s.afterEvent()
		return
	}
	if it.decErr != nil {
		s.eng.Skip(it.pos)
		s.metrics.rejections.WithLabelValues("decode").Inc()
		s.dead.add(it.pos, it.decErr, it.data)
		s.afterEvent()
		return
	}
	ev := it.ev
	if s.skip != nil && s.skip.coversEvent(it.pos, ev) {
		s.eng.Pass(it.pos)
		s.afterEvent()
		return
	}
	if _, err := s.eng.Apply(it.pos, ev); err != nil {
		reason := "other"
		if rj := (*learner.Rejection)(nil); errors.As(err, &rj) {
			reason = rj.Kind.String()
		}
		s.metrics.rejections.WithLabelValues(reason).Inc()
		s.dead.add(it.pos, err, it.data)
	} else if a := s.eng.Alarms(); a != s.lastAlarms {
		s.lastAlarms = a
		s.pinBeforeAlarm()
	}
	s.afterEvent()
}

func (s *Service) afterEvent() {
	s.sinceCk++
	s.handled.Add(1)
	if s.skip != nil && s.skip.done(s.eng) {
		s.cfg.Log.Info("restore: the skipped range is behind; back to normal intake")
		s.skip = nil
	}
	if n := s.eng.Applied(); n%s.cfg.CurveEvery == 0 && n > 0 {
		s.curves.add(s.eng)
	}
}

// pinBeforeAlarm pins the newest checkpoint, taken before the alarm, so that
// retention keeps a state from before the drift.
func (s *Service) pinBeforeAlarm() {
	if s.lastCk.Version == 0 {
		return
	}
	if err := s.store.PinFor(s.lastCk.Version, "drift"); err != nil {
		s.cfg.Log.Error("could not pin the checkpoint before a drift alarm", "version", s.lastCk.Version, "error", err)
		return
	}
	s.cfg.Log.Warn("drift alarm: pinned the checkpoint taken before it", "version", s.lastCk.Version)
	// Keep the newest MaxDriftPins automatic pins: a stream that alarms
	// often would otherwise pin without end. An operator's pins stay.
	pins, err := s.store.Pins()
	if err != nil {
		return
	}
	var drift []uint64
	for v, why := range pins {
		if why == "drift" {
			drift = append(drift, v)
		}
	}
	slices.Sort(drift)
	for len(drift) > s.cfg.MaxDriftPins {
		s.store.Unpin(drift[0])
		drift = drift[1:]
	}
}

// checkpoint writes the engine's state; parent 0 means the last checkpoint.
func (s *Service) checkpoint(reason checkpoint.Reason, parent uint64) error {
	if parent == 0 {
		parent = s.lastCk.Version
	}
	info, err := persist.Save(s.store, s.eng, reason, parent, serviceSource{Kind: "service", Skip: s.skip})
	if err != nil {
		s.metrics.checkpointFailures.Inc()
		return err
	}
	s.lastCk, s.sinceCk, s.lastCkTime = info, 0, time.Now()
	s.ckPositions[info.Version] = s.eng.Positions()
	s.cfg.Log.Info("checkpoint", "version", info.Version, "reason", reason, "events", info.Events, "bytes", info.Bytes)
	s.afterCheckpoint()
	return nil
}

// afterCheckpoint tells the source what the checkpoints cover: the newest
// (Kafka commits it) and the oldest retained (the journal deletes what
// precedes it), and flushes the dead letters.
func (s *Service) afterCheckpoint() {
	if err := s.dead.flush(); err != nil {
		s.cfg.Log.Error("dead letters: flush failed", "error", err)
	}
	s.src.Checkpointed(s.eng.Positions(), s.oldestRetained())
}

// oldestRetained returns, per partition, the lowest position any retained
// checkpoint covers (0 where one of them covers nothing of a partition).
// Positions of checkpoints are remembered as they are written; others (from
// before a restart) are read from their manifests once.
func (s *Service) oldestRetained() []learner.Position {
	vs, err := s.store.Versions()
	if err != nil {
		return nil
	}
	var held [][]learner.Position
	parts := map[int32]bool{}
	for _, v := range vs {
		ps, ok := s.ckPositions[v]
		if !ok {
			m, err := s.store.ReadManifest(v)
			if err != nil {
				continue // a corrupt file protects nothing
			}
			for _, p := range m.Positions {
				ps = append(ps, learner.Position{Partition: p.Partition, Offset: p.Offset})
			}
			s.ckPositions[v] = ps
		}
		held = append(held, ps)
		for _, p := range ps {
			parts[p.Partition] = true
		}
	}
	for v := range s.ckPositions {
		if !slices.Contains(vs, v) {
			delete(s.ckPositions, v)
		}
	}
	out := make([]learner.Position, 0, len(parts))
	for p := range parts {
		low := int64(-1)
		for _, ps := range held {
			off := int64(0) // a checkpoint without the partition covers none of it
			for _, q := range ps {
				if q.Partition == p {
					off = q.Offset
				}
			}
			if low < 0 || off < low {
				low = off
			}
		}
		out = append(out, learner.Position{Partition: p, Offset: low})
	}
	slices.SortFunc(out, func(a, b learner.Position) int { return int(a.Partition - b.Partition) })
	return out
}

// publish makes the engine's current state and the service's status visible
// to readers. The engine is copied only when it changed since the last
// snapshot; the status (readiness, fault, the source's health and lag, dead
// letters, the checkpoint listing) is read afresh each time.
func (s *Service) publish() {
	cur := s.snap.Load()
	var state *stateView
	if cur != nil && cur.state.current(s.eng, s.lastCk) {
		state = cur.state
	} else {
		state = newStateView(s.eng, s.lastCk)
	}
	snap := &snapshot{state: state, ready: s.ready.Load(), fault: s.fault.Load(), dead: s.dead.count(), at: time.Now()}
	var outage *intake.Outage
	if err := s.src.Health(); errors.As(err, &outage) {
		snap.outage = outage
	}
	if k, ok := s.src.(interface{ Connected() (bool, time.Time) }); ok { // sources that connect to something
		up, _ := k.Connected()
		snap.connected = &up
	}
	applied := map[int32]int64{}
	for _, p := range state.eng.Positions() {
		applied[p.Partition] = p.Offset
	}
	last, _ := s.src.Available()
	for _, l := range last {
		snap.lag = append(snap.lag, learner.Position{Partition: l.Partition, Offset: max(0, l.Offset-applied[l.Partition])})
	}
	if list, err := s.store.List(); err == nil {
		snap.checkpoints = list
	} else if cur != nil {
		snap.checkpoints = cur.checkpoints
	}
	s.snap.Store(snap)
}

// logWriter adapts a logger to an io.Writer for packages that log lines.
type logWriter struct {
	l interface{ Info(string, ...any) }
}

func (w logWriter) Write(p []byte) (int, error) {
	w.l.Info(string(trimNL(p)))
	return len(p), nil
}

func trimNL(p []byte) []byte {
	for len(p) > 0 && p[len(p)-1] == '\n' {
		p = p[:len(p)-1]
	}
	return p
}

func positionsText(ps []checkpoint.Position) string {
	out := ""
	for i, p := range ps {
		if i > 0 {
			out += " "
		}
		out += fmt.Sprintf("%d:%d", p.Partition, p.Offset)
	}
	return out
}

func newTextLogger(w io.Writer) *slog.Logger { return slog.New(slog.NewTextHandler(w, nil)) }

// Progress reports the events applied and whether the engine's state covers
// every given position (benchmarks and tools wait on it).
func (s *Service) Progress(want []learner.Position) (applied int64, covered bool) {
	snap := s.snap.Load()
	if snap == nil {
		return 0, false
	}
	covered = true
	for _, p := range want {
		covered = covered && snap.state.eng.Covers(p)
	}
	return snap.state.applied, covered
}
