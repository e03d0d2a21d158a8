package api

import (
	"context"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"sync/atomic"
	"time"

	"tidemark/api/intake"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Service is tidemark running: its lifecycle and its HTTP layer. One
// goroutine, the loop (loop.go), owns the engine and applies events from the
// source in position order; HTTP handlers read the snapshots it publishes
// and send it commands (take a checkpoint, restore one, skip journal
// damage). Shutdown order: stop HTTP intake, stop the source, take a
// shutdown checkpoint, commit offsets, close.
type Service struct {
	cfg     Config
	loop    *loop
	journal intake.Appender // the source, when it takes events over HTTP; else nil
	metrics *metrics
	curves  *curves
	notes   *notes
	http    *http.Server

	snap  atomic.Pointer[snapshot] // published by the loop
	fault atomic.Pointer[fault]    // what stopped intake, or nil; set by the loop, the source and the events handler

	addr      string
	dataDir   string // absolute, to keep it out of error answers
	listening chan struct{}

	// in a consumer group (route.go)
	kafka       *intake.Kafka
	partitioner intake.Partitioner
	forward     *http.Client
	advertise   string // this instance's address, as the others reach it
}

// Handled returns how many events the loop has handled since start, read
// without waiting for a snapshot (benchmarks poll it).
func (s *Service) Handled() int64 { return s.loop.handled.Load() }

// Addr waits until Run listens and returns the address it listens on, or ""
// when Run failed before it could listen.
func (s *Service) Addr() string {
	<-s.listening
	return s.addr
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
	s := &Service{cfg: cfg, curves: newCurves(cfg.Engine.Learners, cfg.CurvePoints), listening: make(chan struct{})}
	s.dataDir, _ = filepath.Abs(cfg.DataDir)
	s.metrics = newMetrics(s)
	s.notes = newNotes()
	l := &loop{cfg: cfg, eng: eng, metrics: s.metrics, curves: s.curves, notes: s.notes, snap: &s.snap, fault: &s.fault,
		cmds: make(chan command), ckPositions: map[uint64][]learner.Position{}}
	s.loop = l
	if cfg.Kafka != nil {
		l.group = newGroup(cfg.CheckpointDir, cfg.Instance)
		s.partitioner = intake.Partitioners[cfg.Partitioner]
		s.forward = &http.Client{Timeout: cfg.ForwardTimeout}
	} else if l.store, err = checkpoint.OpenStore(checkpoint.StoreConfig{Dir: cfg.CheckpointDir, Retain: cfg.Retain, FS: cfg.CheckpointFS}); err != nil {
		return nil, err
	}
	l.dead, err = openDeadLetters(filepath.Join(cfg.DataDir, "deadletters.ndjson"), cfg.DeadLetterBytes)
	if err != nil {
		s.close()
		return nil, err
	}
	if l.src, err = openSource(cfg); err != nil {
		s.close()
		return nil, err
	}
	s.journal, _ = l.src.(intake.Appender)
	s.kafka, _ = l.src.(*intake.Kafka)
	if err := l.restoreLatest(); err != nil {
		s.close()
		return nil, err
	}
	if l.group != nil {
		if err := l.adoptWholeState(filepath.Join(cfg.DataDir, "checkpoints")); err != nil {
			s.close()
			return nil, err
		}
	}
	if l.group == nil {
		// The curves as of the last checkpoint; in a consumer group they
		// start again, as the partitions owned may differ.
		if err := load(l.curvesPath(), s.curves, s.notes, l.eng.Applied()); err != nil {
			cfg.Log.Warn("the saved error curves cannot be read; they start again", "error", err)
		}
	}
	s.http = s.newHTTP()
	l.publish()
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
		return intake.OpenHistorySource(cfg.History, cfg.Fields)
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
	l := s.loop
	l.closeAnswerLogs()
	for _, ps := range l.group.all() {
		ps.store.Close()
	}
	if l.src != nil {
		l.src.Close()
	}
	if l.dead != nil {
		l.dead.Close()
	}
	if l.store != nil {
		l.store.Close()
	}
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
	if s.kafka != nil {
		s.joinGroup()
	}
	if b := s.cfg.Engine.MemoryBudget; b > 0 {
		s.cfg.Log.Info("memory budget: events of new keys are refused once the state holds this much", "bytes", b, "max_keys", s.cfg.Engine.MaxKeys)
	}
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
	go func() { loopErr <- s.loop.run(loopCtx) }()
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
	l := s.loop
	l.stopSource()
	if cerr := l.checkpoint(checkpoint.Shutdown, 0); cerr != nil {
		err = errors.Join(err, fmt.Errorf("shutdown checkpoint: %w", cerr))
	}
	s.cfg.Log.Info("stopped", "events", l.eng.Applied(), "checkpoint", l.lastCk.Version)
	return err
}

// Handler returns the HTTP handler, for tests that serve it themselves.
func (s *Service) Handler() http.Handler { return s.http.Handler }

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
