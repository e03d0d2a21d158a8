package replay

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"hash"
	"io"
	"runtime"
	"sync"
	"sync/atomic"
	"time"

	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// DefaultRejectLog is how many rejected lines Replay reports one by one
// before it only counts them.
const DefaultRejectLog = 20

// Errors of Replay.
var (
	// ErrStrict: a rejected line in strict mode.
	ErrStrict = errors.New("replay: rejected line in strict mode")
	// ErrResume: a checkpoint cannot be resumed on this history or
	// configuration (the persistence room's sentinel).
	ErrResume = persist.ErrResume
)

// ReplayConfig configures Replay.
type ReplayConfig struct {
	// Strict stops at the first rejected line with an error wrapping ErrStrict.
	Strict bool
	// Log receives one line per rejected event, the first RejectLog of them,
	// then a count at the end, and notes on checkpoints. Nil discards them.
	Log io.Writer
	// RejectLog is the number of rejections logged one by one. Default: DefaultRejectLog.
	RejectLog int
	// Checkpoints, when set, receives a checkpoint every Every lines (0: none
	// but the last), one at the end of the history (reason final) and one
	// when ctx ends the replay early (reason shutdown).
	Checkpoints *checkpoint.Store
	Every       int64
	// Progress, when set, is called from the reading goroutine every 1024
	// lines with the bytes read, the file's size (0 if unknown) and the lines read.
	Progress func(read, size, lines int64)
	// Observe, when set, is called after every applied event, on the
	// goroutine that owns the engine (curves and plots use it).
	Observe func(line int64, ev *learner.Event, eng *learner.Engine)
	// Sequential reads and decodes on the engine's goroutine instead of a
	// second one (the results are the same; it exists to measure the gain).
	Sequential bool
	// Helpers are further engines, each with its own learners, fed the same
	// lines as the main one on goroutines of their own (ReplayParallel sets
	// them). Not with Checkpoints or Resume.
	Helpers []*learner.Engine
	// Resume restores the newest good checkpoint in Checkpoints and continues
	// after the line it covers. It refuses (ErrResume) when the checkpoint was
	// taken under another configuration or over a history this one does not
	// extend. With no checkpoint at all the replay starts from the beginning.
	Resume bool
	// LabelDelay, when positive, replays the history as a service that
	// serves predictions and gets each label this much event time later
	// (served.go): at each event's time every learner (and the leader)
	// answers for it from the state as it is then, and the event — its
	// label — is applied and scores those answers once the stream's
	// clock has passed its time + LabelDelay. The prequential figures are
	// those of a replay without it (the events are applied in the same
	// order); the served ones are what answers given that much before
	// their labels scored. Events need times. Not with Helpers,
	// Checkpoints or Resume.
	LabelDelay time.Duration
}

// historySource is the manifest's record of a replay's position in its
// history: the number of lines consumed and the SHA-256 of those lines, so
// that a resume can prove the history it continues is the same one.
type historySource struct {
	Kind         string   `json:"kind"` // "history"
	Lines        int64    `json:"lines"`
	PrefixSHA256 string   `json:"prefix_sha256"`
	Learners     []string `json:"learners"`
}

// replayer is one run of Replay.
type replayer struct {
	cfg     ReplayConfig
	eng     *learner.Engine
	prefix  hash.Hash // the reader's: SHA-256 of the lines read so far
	lines   int64     // the reader's: lines read
	applied int64     // the engine side: the last line stepped through
	digest  [32]byte  // SHA-256 of lines 1..applied, when a checkpoint is due

	finalDigest [32]byte
	parent      uint64
	resume      *historySource // the checkpoint resumed from, until its prefix is verified
	logged      int
	rejects     int
	waiting     []lateEvent  // asked, label not yet due (LabelDelay)
	keys        learner.Keys // the reader's: keys seen, decoded without allocating again
	engKeys     learner.Keys // the same, for lines the engine's goroutine decodes
	unit        string       // "line" or "row", in messages
	// split shares the decoding of each batch between the reader and the
	// engine's goroutine (run, without helper engines).
	split bool
}

// Replay runs every line of h through eng, test-then-train, in order. Each
// line's position is its line number in partition 0; a line the engine's state
// already covers is not applied again. It returns when the history ends, ctx
// is done, or (strict) at the first rejection.
func Replay(ctx context.Context, h *intake.History, eng *learner.Engine, cfg ReplayConfig) error {
	if cfg.RejectLog == 0 {
		cfg.RejectLog = DefaultRejectLog
	}
	r := &replayer{cfg: cfg, eng: eng, prefix: sha256.New(), unit: h.Unit()}
	if len(cfg.Helpers) > 0 && (cfg.Checkpoints != nil || cfg.Resume || cfg.Sequential) {
		return errors.New("replay: helper engines cannot be combined with checkpoints, resume or a sequential run")
	}
	if cfg.LabelDelay > 0 && (len(cfg.Helpers) > 0 || cfg.Checkpoints != nil || cfg.Resume) {
		return errors.New("replay: a label delay cannot be combined with parallel learners, checkpoints or resume")
	}
	if cfg.Resume {
		if cfg.Checkpoints == nil {
			return fmt.Errorf("%w: no checkpoint directory given", ErrResume)
		}
		if err := r.restore(); err != nil {
			return err
		}
	}
	err := r.run(ctx, h)
	if r.resume != nil && err == nil {
		return fmt.Errorf("%w: the history has %d lines but the checkpoint covers %d; it is not the history the checkpoint was taken on",
			ErrResume, r.applied, r.resume.Lines)
	}
	if cfg.Log != nil && r.rejects > r.logged {
		fmt.Fprintf(cfg.Log, "%d rejected lines in all (%d shown)\n", r.rejects, r.logged)
	}
	if cfg.Checkpoints == nil || r.resume != nil {
		return err
	}
	switch {
	case err == nil:
		r.digest = r.finalDigest
		return r.checkpoint(checkpoint.Final)
	case ctx.Err() != nil && errors.Is(err, ctx.Err()):
		if cerr := r.checkpoint(checkpoint.Shutdown); cerr != nil {
			return errors.Join(err, cerr)
		}
	}
	return err
}

// lineItem is one line of the history, read and decoded ahead of the engine.
type lineItem struct {
	no      int64
	kind    lineKind
	ev      learner.Event
	err     error
	digest  [32]byte // SHA-256 of lines 1..no
	readErr error    // a read failure: the replay stops with it
	raw     []byte   // the line, until it is decoded (its own copy)
	// state says who decodes a lineEvent: undecoded, claimed (by the
	// reader or the engine's goroutine, which then decodes it), decoded.
	state atomic.Int32
}

const (
	undecoded int32 = iota
	claimed
	decoded
)

type lineKind uint8

const (
	lineEvent lineKind = iota
	lineBad            // did not decode: err says why
	lineTooLong
	lineBlank
	lineEOF // the end: digest covers every line
)

const batchLines = 512

// read is the first stage of the replay pipeline: it reads, hashes and
// decodes lines in order and hands them over in batches, so that decoding
// overlaps learning on a second core. The engine still sees every line in
// file order, so results are identical to a single-goroutine run.
func (r *replayer) read(ctx context.Context, h *intake.History, out chan<- []lineItem, free chan []lineItem) {
	defer close(out)
	batch := <-free
	batch = batch[:0]
	var events []int // the batch's event lines, for the reader's share of the decoding
	send := func() bool {
		sent := batch
		if r.split {
			events = events[:0]
			for i := range sent {
				if sent[i].kind == lineEvent { // read before the batch is handed over
					events = append(events, i)
				}
			}
			if len(out) > 0 {
				// The engine has batches waiting: it is the slower side
				// (many keys, costly learners), so the reader decodes the
				// whole batch before handing it over.
				for _, i := range events {
					claim(&sent[i], &r.keys)
				}
				events = events[:0]
			}
		}
		select {
		case out <- batch:
		case <-ctx.Done():
			return false
		}
		if r.split {
			// Decode the batch from its end while the engine's goroutine
			// decodes and applies it from its start, until they meet: the
			// two cores share the decoding as they are free to.
			for k := len(events) - 1; k >= 0; k-- {
				if !claim(&sent[events[k]], &r.keys) {
					break
				}
			}
		}
		select {
		case batch = <-free:
		case <-ctx.Done():
			return false
		}
		batch = batch[:0]
		return true
	}
	for {
		batch = batch[:len(batch)+1]
		it := &batch[len(batch)-1]
		r.next(h, it)
		if r.cfg.Progress != nil && it.no%1024 == 0 {
			r.cfg.Progress(h.BytesRead(), h.Size(), it.no)
		}
		if it.kind == lineEOF || it.readErr != nil {
			send()
			return
		}
		if len(batch) == cap(batch) && !send() {
			return
		}
	}
}

// next reads, hashes and decodes the next line into it.
func (r *replayer) next(h *intake.History, it *lineItem) {
	it.state.Store(decoded) // but an event line left to run's goroutines
	line, no, err := h.Next()
	it.err, it.readErr = nil, nil
	if err == io.EOF {
		it.kind, it.no = lineEOF, r.lines
		if r.cfg.Checkpoints != nil {
			r.prefix.Sum(it.digest[:0])
		}
		return
	}
	tooLong := errors.Is(err, intake.ErrLineTooLong)
	badRow := errors.Is(err, intake.ErrBadRow)
	if err != nil && !tooLong && !badRow {
		it.no, it.readErr = no, err
		return
	}
	r.lines, it.no = no, no
	if r.cfg.Checkpoints != nil {
		// Only a checkpoint records the digest of the lines it covers
		// (and a resume checks it): without one, no line is hashed.
		switch {
		case tooLong:
			r.prefix.Write([]byte("\x00line too long\n"))
		case badRow:
			r.prefix.Write([]byte("\x00bad row\n"))
		default:
			r.prefix.Write(line)
			r.prefix.Write([]byte{'\n'})
		}
		r.prefix.Sum(it.digest[:0])
	}
	switch {
	case tooLong:
		it.kind, it.err = lineTooLong, err
	case badRow:
		it.kind, it.err = lineBad, err
	case len(bytes.TrimSpace(line)) == 0:
		it.kind = lineBlank
	default:
		it.kind = lineEvent
		if r.split {
			// Decoded later by whichever goroutine gets to it first (see
			// run): the line is copied out of the reader's buffer.
			it.raw = append(it.raw[:0], line...)
			it.state.Store(undecoded)
			return
		}
		decodeItem(it, line, &r.keys)
	}
}

// decodeItem decodes an event line into it, with keys interned by keys.
func decodeItem(it *lineItem, line []byte, keys *learner.Keys) {
	if derr := keys.Decode(line, &it.ev); derr != nil {
		it.kind, it.err = lineBad, derr
	}
	it.state.Store(decoded)
}

// claim decodes it on the calling goroutine when no other has claimed it,
// and reports whether it did.
func claim(it *lineItem, keys *learner.Keys) bool {
	if !it.state.CompareAndSwap(undecoded, claimed) {
		return false
	}
	decodeItem(it, it.raw, keys)
	return true
}

// ready waits until it is decoded: decoding it itself when no one has begun,
// else for the goroutine that did (a line's decoding takes well under a
// microsecond). Lines that need no decoding are marked decoded by next.
func ready(it *lineItem, keys *learner.Keys) {
	if it.state.Load() == decoded || claim(it, keys) {
		return
	}
	for it.state.Load() != decoded {
		runtime.Gosched()
	}
}

func (r *replayer) run(ctx context.Context, h *intake.History) error {
	if r.cfg.Sequential {
		return r.runSequential(ctx, h)
	}
	out := make(chan []lineItem, 2)
	free := make(chan []lineItem, 4)
	for i := 0; i < 4; i++ {
		free <- make([]lineItem, 0, batchLines)
	}
	rctx, cancel := context.WithCancel(ctx)
	defer func() {
		cancel()
		for range out { // let the reader finish
		}
	}()
	r.split = len(r.cfg.Helpers) == 0
	go r.read(rctx, h, out, free)
	helpers := make([]chan []lineItem, len(r.cfg.Helpers))
	var batchDone sync.WaitGroup
	for i, eng := range r.cfg.Helpers {
		helpers[i] = make(chan []lineItem)
		go func() {
			for batch := range helpers[i] {
				applyLines(eng, batch)
				batchDone.Done()
			}
		}()
	}
	defer func() {
		for _, ch := range helpers {
			close(ch)
		}
	}()
	for batch := range out {
		batchDone.Add(len(helpers))
		for _, ch := range helpers {
			ch <- batch
		}
		var err error
		eof := false
		for i := range batch {
			it := &batch[i]
			ready(it, &r.engKeys)
			// With many keys, the next key's state is read ahead (learner.Engine.Prefetch).
			if j := i + learner.PrefetchAhead; j < len(batch) && batch[j].state.Load() == decoded && batch[j].kind == lineEvent {
				r.eng.Prefetch(&batch[j].ev)
			}
			if err = r.step(it); err != nil {
				break
			}
			if it.kind == lineEOF {
				r.finalDigest = it.digest
				eof = true
				break
			}
		}
		batchDone.Wait() // the helpers are done with the batch too
		if err != nil || eof {
			return err
		}
		free <- batch
		if ctx.Err() != nil {
			return ctx.Err()
		}
	}
	if ctx.Err() != nil {
		return ctx.Err()
	}
	return nil
}

// applyLines applies a batch to a helper engine: the same positions, the
// same events, the same refusals as the main engine (which alone logs them).
func applyLines(eng *learner.Engine, batch []lineItem) {
	for i := range batch {
		it := &batch[i]
		pos := learner.Position{Partition: 0, Offset: it.no}
		switch {
		case it.readErr != nil || it.kind == lineEOF || it.kind == lineBlank || eng.Covers(pos):
		case it.kind == lineTooLong || it.kind == lineBad:
			eng.Skip(pos)
		default:
			eng.Apply(pos, &it.ev)
		}
	}
}

// runSequential reads and applies on one goroutine (for comparison).
func (r *replayer) runSequential(ctx context.Context, h *intake.History) error {
	var it lineItem
	for n := 0; ; n++ {
		if n%4096 == 0 && ctx.Err() != nil {
			return ctx.Err()
		}
		r.next(h, &it)
		if r.cfg.Progress != nil && it.no%1024 == 0 {
			r.cfg.Progress(h.BytesRead(), h.Size(), it.no)
		}
		if err := r.step(&it); err != nil {
			return err
		}
		if it.kind == lineEOF {
			r.finalDigest = it.digest
			return nil
		}
	}
}

// step applies one line. Every line carries the digest of the prefix it
// ends, so that a checkpoint at any line (periodic, or on an interrupt) can
// record it.
func (r *replayer) step(it *lineItem) error {
	if it.readErr != nil {
		return it.readErr
	}
	if it.kind == lineEOF {
		return r.flushLate()
	}
	no := it.no
	pos := learner.Position{Partition: 0, Offset: no}
	r.applied, r.digest = no, it.digest
	if r.resume != nil {
		if no < r.resume.Lines {
			return nil
		}
		if got := hex.EncodeToString(it.digest[:]); got != r.resume.PrefixSHA256 {
			return fmt.Errorf("%w: the first %d lines of this history differ from those the checkpoint covered "+
				"(SHA-256 %s, checkpoint %s); it does not extend that history", ErrResume, no, got[:12], r.resume.PrefixSHA256[:12])
		}
		r.resume = nil
		return nil
	}
	var err error
	switch {
	case r.eng.Covers(pos):
	case (it.kind == lineTooLong || it.kind == lineBad) && r.cfg.LabelDelay > 0:
		r.lateSkip(no, it.err) // in line order with the events waiting
	case it.kind == lineTooLong:
		r.eng.Skip(pos)
		err = r.reject(no, it.err)
	case it.kind == lineBlank:
		// a blank line carries no event
	case it.kind == lineBad:
		r.eng.Skip(pos)
		err = r.reject(no, it.err)
	case r.cfg.LabelDelay > 0:
		err = r.late(no, &it.ev)
	default:
		err = r.apply(no, &it.ev)
	}
	if err != nil {
		return err
	}
	if r.cfg.Checkpoints != nil && r.cfg.Every > 0 && no%r.cfg.Every == 0 {
		return r.checkpoint(checkpoint.Periodic)
	}
	return nil
}

// apply applies the event of line no.
func (r *replayer) apply(no int64, ev *learner.Event) error {
	if _, err := r.eng.Apply(learner.Position{Partition: 0, Offset: no}, ev); err != nil {
		return r.reject(no, err)
	}
	if r.cfg.Observe != nil {
		r.cfg.Observe(no, ev, r.eng)
	}
	return nil
}

func (r *replayer) reject(line int64, err error) error {
	r.rejects++
	if r.cfg.Strict {
		return fmt.Errorf("%w: %s %d: %v", ErrStrict, r.unit, line, err)
	}
	if r.cfg.Log != nil && r.logged < r.cfg.RejectLog {
		fmt.Fprintf(r.cfg.Log, "%s %d: %v\n", r.unit, line, err)
		r.logged++
	}
	return nil
}

func (r *replayer) learnerSpecs() []string {
	var out []string
	for _, s := range r.eng.Config().Learners {
		out = append(out, s.Text)
	}
	return out
}

// checkpoint writes the engine's state and the history position.
func (r *replayer) checkpoint(reason checkpoint.Reason) error {
	info, err := persist.Save(r.cfg.Checkpoints, r.eng, reason, r.parent, historySource{Kind: "history", Lines: r.applied,
		PrefixSHA256: hex.EncodeToString(r.digest[:]), Learners: r.learnerSpecs()})
	if err != nil {
		return err
	}
	r.parent = info.Version
	return nil
}

// restore loads the newest good checkpoint into the engine.
func (r *replayer) restore() error {
	c, skipped, err := persist.Newest(r.cfg.Checkpoints)
	for _, s := range skipped {
		if r.cfg.Log != nil {
			fmt.Fprintf(r.cfg.Log, "skipping a checkpoint that fails its checks: %v\n", s)
		}
	}
	if err == nil && c == nil {
		if r.cfg.Log != nil {
			fmt.Fprintf(r.cfg.Log, "no checkpoint in %s to resume from; starting at the first line\n", r.cfg.Checkpoints.Dir())
		}
		return nil
	}
	if err != nil {
		return err
	}
	var src historySource
	if err := json.Unmarshal(c.Manifest.Source, &src); err != nil || src.Kind != "history" {
		return fmt.Errorf("%w: checkpoint %d was not taken by a replay of a history file", ErrResume, c.Manifest.Version)
	}
	if err := persist.Adopt(r.eng, c, fmt.Sprintf("it was taken with learners %q; now %q (or other settings differ); "+
		"resume with the same --learner flags and settings, or use another checkpoint directory", src.Learners, r.learnerSpecs())); err != nil {
		return err
	}
	if r.cfg.Log != nil {
		fmt.Fprintf(r.cfg.Log, "resuming from checkpoint %d after line %d (%d events applied)\n", c.Manifest.Version, src.Lines, c.Manifest.Events)
	}
	r.parent = c.Manifest.Version
	if src.Lines > 0 {
		r.resume = &src
	}
	return nil
}
