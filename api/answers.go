package api

import (
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strings"

	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Served answers (issue 16, learner/served.go). Every predict answer gets an
// id (the caller's answer_id, or one made here); the loop registers it in
// the engine after the offset its key's partition has reached and writes it,
// with that offset, to the partition's answer log, and the handler returns
// the answer only once the log has it on stable storage. A later event
// naming the id is its label. After a restart (or a restore) the loop reads
// each log from where the state's checkpoint left it and registers the
// answers again after their offsets, so that the served figures are those of
// a run that never stopped: no answer is lost or scored twice.
//
// Logs: DataDir/answers/partition-NNNNN/local (one instance), or in a
// consumer group CheckpointDir/partition-NNNNN/answers/g<generation>-<instance>,
// one per owner and generation, beside the partition's checkpoints, so that
// the partition's next owner reads what its last owner served.

// answerLogBytes is the segment size of an answer log (a variable for the
// tests, which make segments small to see them go).
var answerLogBytes int64 = 16 << 20

// answerRecord is one line of an answer log.
type answerRecord struct {
	ID        string   `json:"id"`
	Key       string   `json:"key"`
	Partition int32    `json:"partition"`
	Learner   string   `json:"learner"` // by name: an index would mean another learner under another configuration
	Value     float64  `json:"value"`
	Low       *float64 `json:"low,omitempty"`
	High      *float64 `json:"high,omitempty"`
	At        *int64   `json:"at,omitempty"` // the stream clock when served, Unix ns
	After     int64    `json:"after"`
}

// answerLog is a log this instance writes.
type answerLog struct {
	name string
	j    *intake.Journal
}

// answerLogs are the loop's answer logs, by partition. The loop alone uses
// it, but for Sync, which handlers call.
type answerLogs struct {
	open    map[int32]*answerLog
	covered map[string]map[string]int64 // per checkpoint (store directory and version), its serviceSource.Answers (trimAnswerLogs)
}

// answersRoot is the directory of partition p's answer logs.
func (l *loop) answersRoot(p int32) string {
	if l.group != nil {
		return filepath.Join(persist.PartitionDir(l.group.dir, p), "answers")
	}
	return persist.PartitionDir(filepath.Join(l.cfg.DataDir, "answers"), p)
}

// writerName is the name of the log this instance writes now.
func (l *loop) writerName() string {
	if l.group == nil {
		return "local"
	}
	return fmt.Sprintf("g%010d-%s", l.group.gen.ID, fileSafe(l.group.instance))
}

// fileSafe keeps letters, digits, '.', '-' and '_' of s, replacing the rest.
func fileSafe(s string) string {
	return strings.Map(func(r rune) rune {
		if r < 0x80 && (r == '.' || r == '-' || r == '_' || r >= '0' && r <= '9' || r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z') {
			return r
		}
		return '_'
	}, s)
}

// answerLog returns the log answers of partition p go to, opened when new.
func (l *loop) answerLog(p int32) (*answerLog, error) {
	if a := l.answers.open[p]; a != nil {
		return a, nil
	}
	name := l.writerName()
	j, err := intake.OpenJournal(intake.JournalConfig{Dir: filepath.Join(l.answersRoot(p), name), SegmentBytes: answerLogBytes})
	if err != nil {
		return nil, err
	}
	if l.answers.open == nil {
		l.answers.open = map[int32]*answerLog{}
	}
	a := &answerLog{name: name, j: j}
	l.answers.open[p] = a
	return a, nil
}

// closeAnswerLog closes partition p's log, which this instance stops writing.
func (l *loop) closeAnswerLog(p int32) {
	if a := l.answers.open[p]; a != nil {
		a.j.Close()
		delete(l.answers.open, p)
	}
}

func (l *loop) closeAnswerLogs() {
	for p := range l.answers.open {
		l.closeAnswerLog(p)
	}
}

// written is where an answer went: the log and its offset there, for the
// handler to wait on.
type written struct {
	log *intake.Journal
	seq int64
}

// serveAnswers registers answers on the loop: all of them, written to their
// logs, or (the first refusal's error) none.
func (l *loop) serveAnswers(as []learner.Answer) ([]written, error) {
	for i := range as {
		if err := l.eng.PrepareAnswer(&as[i]); err != nil {
			return nil, fmt.Errorf("row %d: %w", i, err)
		}
		for j := range i {
			if as[j].ID == as[i].ID {
				return nil, fmt.Errorf("row %d: %w: %q (also row %d)", i, learner.ErrDuplicateAnswer, as[i].ID, j)
			}
		}
	}
	out := make([]written, len(as))
	for i := range as {
		a := &as[i]
		log, err := l.answerLog(a.Partition)
		if err != nil {
			return nil, err
		}
		rec := answerRecord{ID: a.ID, Key: a.Key, Partition: a.Partition, Learner: l.learnerName(a.Learner), Value: a.Value, After: a.After}
		if a.HasInterval {
			rec.Low, rec.High = &a.Low, &a.High
		}
		if a.HasAt {
			rec.At = &a.At
		}
		b, _ := json.Marshal(rec)
		_, seq, err := log.j.Write([][]byte{b})
		if err != nil {
			// The rows before this one are registered and logged; the
			// request fails, so their ids are never returned: they wait
			// unlabelled until they expire, counted as such.
			return nil, err
		}
		a.Log, a.Seq = log.name, seq
		if err := l.eng.Serve(*a); err != nil {
			return nil, err // cannot happen: prepared above, on this goroutine
		}
		out[i] = written{log.j, seq}
	}
	return out, nil
}

// learnerName names answer row i (a learner, or the leader).
func (l *loop) learnerName(i int) string {
	if ls := l.cfg.Engine.Learners; i < len(ls) {
		return ls[i].Name
	}
	return learner.LeaderName
}

// replayAnswers registers in eng the answers its state does not hold yet
// from the logs of partitions parts (every partition with logs when nil),
// each log from the offset after the state's: what a restart, a restore or
// a partition's new owner does before it applies events again.
func (l *loop) replayAnswers(eng *learner.Engine, parts []int32) error {
	if parts == nil {
		ents, err := os.ReadDir(filepath.Join(l.cfg.DataDir, "answers"))
		if err != nil && !errors.Is(err, os.ErrNotExist) {
			return err
		}
		for _, e := range ents {
			var p int32
			if _, err := fmt.Sscanf(e.Name(), "partition-%05d", &p); err == nil {
				parts = append(parts, p)
			}
		}
	}
	index := map[string]int{learner.LeaderName: len(l.cfg.Engine.Learners)}
	for i, s := range l.cfg.Engine.Learners {
		index[s.Name] = i
	}
	n := 0
	for _, p := range parts {
		ents, err := os.ReadDir(l.answersRoot(p))
		if errors.Is(err, os.ErrNotExist) {
			continue
		}
		if err != nil {
			return err
		}
		var names []string
		for _, e := range ents {
			if e.IsDir() {
				names = append(names, e.Name())
			}
		}
		slices.Sort(names)
		for _, name := range names {
			from := eng.ServedLog(p, name) + 1
			err := intake.ReadJournal(filepath.Join(l.answersRoot(p), name), from, func(seq int64, b []byte) error {
				var rec answerRecord
				if err := json.Unmarshal(b, &rec); err != nil {
					return fmt.Errorf("answer log %s/%s offset %d: %w", l.answersRoot(p), name, seq, err)
				}
				i, ok := index[rec.Learner]
				if !ok || rec.Partition != p {
					return nil // of another configuration, or misplaced: not ours to score
				}
				a := learner.Answer{ID: rec.ID, Key: rec.Key, Partition: p, Learner: i, Value: rec.Value, After: rec.After, Log: name, Seq: seq}
				if rec.Low != nil && rec.High != nil {
					a.Low, a.High, a.HasInterval = *rec.Low, *rec.High, true
				}
				if rec.At != nil {
					a.At, a.HasAt = *rec.At, true
				}
				if err := eng.Serve(a); err != nil && !errors.Is(err, learner.ErrDuplicateAnswer) {
					return err
				}
				n++
				return nil
			})
			if err != nil {
				return err
			}
		}
	}
	if n > 0 {
		l.cfg.Log.Info("answers served before read back from their logs", "answers", n)
	}
	return nil
}

// answerCoverage is, per answer log of partitions parts (all when nil),
// the last offset eng's state holds: a checkpoint's record of it.
func answerCoverage(eng *learner.Engine, parts []int32) map[string]int64 {
	out := map[string]int64{}
	for _, pos := range eng.Positions() {
		if parts != nil && !slices.Contains(parts, pos.Partition) {
			continue
		}
		for name, seq := range eng.ServedLogs(pos.Partition) {
			out[logKey(pos.Partition, name)] = seq
		}
	}
	if len(out) == 0 {
		return nil
	}
	return out
}

func logKey(p int32, name string) string { return fmt.Sprintf("partition-%05d/%s", p, name) }

// trimAnswerLogs lets each log this instance writes for partitions parts (all
// when nil) forget the answers every checkpoint retained in store holds: a
// restore to any of them reads the log from there on.
func (l *loop) trimAnswerLogs(store *checkpoint.Store, parts []int32) {
	if len(l.answers.open) == 0 {
		return
	}
	vs, err := store.Versions()
	if err != nil {
		return
	}
	if l.answers.covered == nil {
		l.answers.covered = map[string]map[string]int64{}
	}
	ck := func(v uint64) string { return fmt.Sprintf("%s#%d", store.Dir(), v) }
	var held []map[string]int64
	kept := map[string]bool{}
	for _, v := range vs {
		kept[ck(v)] = true
		c, ok := l.answers.covered[ck(v)]
		if !ok {
			m, err := store.ReadManifest(v)
			if err != nil {
				continue // a corrupt file protects nothing
			}
			var src serviceSource
			json.Unmarshal(m.Source, &src)
			c = src.Answers
			l.answers.covered[ck(v)] = c
		}
		held = append(held, c)
	}
	for k := range l.answers.covered {
		if strings.HasPrefix(k, store.Dir()+"#") && !kept[k] {
			delete(l.answers.covered, k)
		}
	}
	for p, a := range l.answers.open {
		if parts != nil && !slices.Contains(parts, p) {
			continue
		}
		low := int64(-1)
		for _, c := range held {
			if s := c[logKey(p, a.name)]; low < 0 || s < low { // a checkpoint without it holds none of it
				low = s
			}
		}
		if low > 0 {
			if err := a.j.DeleteBefore(low + 1); err != nil {
				l.cfg.Log.Warn("an answer log could not forget what every checkpoint holds", "log", a.name, "error", err)
			}
		}
	}
}

// newAnswerID makes an id for an answer whose request gave none.
func newAnswerID() string {
	var b [12]byte
	rand.Read(b[:])
	return "a-" + hex.EncodeToString(b[:])
}
