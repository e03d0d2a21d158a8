// Package persist is the one place where the engine's state meets the
// checkpoint store: it builds manifests, saves the state with a record of
// its source, and loads the newest good checkpoint back into an engine after
// checking that it was taken under the same configuration. The service and
// the replay both use it; neither knows the other.
//
// Nothing here holds state; every function is safe for concurrent use on
// distinct engines (an engine itself belongs to one goroutine).
package persist

import (
	"encoding/json"
	"errors"
	"fmt"
	"path/filepath"
	"slices"
	"time"

	"tidemark/checkpoint"
	"tidemark/learner"
)

// ErrResume: a checkpoint cannot be resumed here — it was taken under
// another configuration of learners or features, or (for a replay) over
// another history.
var ErrResume = errors.New("persist: cannot resume")

// Manifest fills a checkpoint manifest from the engine's state: positions,
// events applied, the configuration digest and each learner's overall
// figures. The store assigns the version and the creation time.
func Manifest(eng *learner.Engine, reason checkpoint.Reason, parent uint64) checkpoint.Manifest {
	m := checkpoint.Manifest{Parent: parent, Reason: reason, Events: eng.Applied(), ConfigSHA256: eng.Config().Digest(), EventTimes: eventTimes(eng)}
	for _, p := range eng.Positions() {
		m.Positions = append(m.Positions, checkpoint.Position{Partition: p.Partition, Offset: p.Offset})
	}
	for _, l := range eng.Report(false).Learners {
		m.Metrics = append(m.Metrics, checkpoint.Metric{Name: l.Name, Scored: l.Scored, MAE: l.MAE, RMSE: l.RMSE})
	}
	return m
}

// eventTimes is the range of event times the engine (or the given
// partitions of it) applied, nil when unknown.
func eventTimes(eng *learner.Engine, partitions ...int32) *checkpoint.TimeRange {
	first, last, ok := eng.EventTimes(partitions...)
	if !ok {
		return nil
	}
	return &checkpoint.TimeRange{First: time.Unix(0, first).UTC(), Last: time.Unix(0, last).UTC()}
}

// Save writes the engine's state (a live engine or a published copy) to
// store as a new version with the given
// reason and parent (0: none); source, marshalled to JSON, records what the
// state was read from (a service's skip rule, a replay's history prefix).
func Save(store *checkpoint.Store, eng *learner.Engine, reason checkpoint.Reason, parent uint64, source any) (checkpoint.Info, error) {
	m := Manifest(eng, reason, parent)
	if source != nil {
		b, err := json.Marshal(source)
		if err != nil {
			return checkpoint.Info{}, fmt.Errorf("persist: source record: %w", err)
		}
		m.Source = b
	}
	// Key by key into the file: the state is never in memory twice.
	return store.WriteState(m, func(sink checkpoint.Sink) error { return eng.EncodeSections(sink) })
}

// Adopt decodes checkpoint c into eng after checking that it was taken under
// eng's configuration; otherwise the error wraps ErrResume and ends with
// hint (what the user should do). A checkpoint not yet verified (Store.Open)
// has its state digest checked while it is decoded, on another goroutine; on
// a mismatch the error wraps checkpoint.ErrCorrupt and eng is unchanged.
func Adopt(eng *learner.Engine, c *checkpoint.Checkpoint, hint string) error {
	if !slices.Contains(eng.Config().Digests(), c.Manifest.ConfigSHA256) {
		return fmt.Errorf("%w: checkpoint %d was taken under another configuration of learners or features; %s", ErrResume, c.Manifest.Version, hint)
	}
	verified := make(chan error, 1)
	go func() { verified <- c.Verify() }()
	fresh, err := learner.NewEngine(eng.Config())
	if err == nil {
		err = fresh.DecodeSections(FromCheckpoint(c.Sections))
	}
	if verr := <-verified; verr != nil {
		return verr
	}
	if err != nil {
		return fmt.Errorf("checkpoint %d: %w", c.Manifest.Version, err)
	}
	*eng = *fresh
	return nil
}

// AdoptStream decodes the checkpoint st as it is read into eng, after
// checking that it was taken under eng's configuration (otherwise the error
// wraps ErrResume and ends with hint), and closes st. The state is built
// aside and adopted only when every check of the file passed, its CRC-32C and
// state digest included, which are known once it is read: on any failure the
// error wraps checkpoint.ErrCorrupt when the file is at fault, and eng is
// unchanged.
func AdoptStream(eng *learner.Engine, st *checkpoint.Stream, hint string) error {
	if !slices.Contains(eng.Config().Digests(), st.Manifest.ConfigSHA256) {
		st.Close()
		return fmt.Errorf("%w: checkpoint %d was taken under another configuration of learners or features; %s", ErrResume, st.Manifest.Version, hint)
	}
	fresh, err := learner.NewEngine(eng.Config())
	if err == nil {
		err = fresh.DecodeStream(st)
	}
	if verr := st.Close(); verr != nil {
		return verr // the file is at fault, whatever decoding said
	}
	if err != nil {
		return fmt.Errorf("checkpoint %d: %w", st.Manifest.Version, err)
	}
	*eng = *fresh
	return nil
}

// AdoptNewest adopts the newest checkpoint of store that passes every check,
// trying older ones in turn (see AdoptStream: each is read once, as it
// decodes). It returns the checkpoint adopted (nil when the store holds none;
// eng is then unchanged) and the errors of those it passed over. A
// checkpoint of another configuration stops it with an error wrapping
// ErrResume.
func AdoptNewest(store *checkpoint.Store, eng *learner.Engine, hint string) (st *checkpoint.Stream, skipped []error, err error) {
	vs, err := store.Versions()
	if err != nil {
		return nil, nil, err
	}
	for i := len(vs) - 1; i >= 0; i-- {
		st, err := store.Stream(vs[i])
		if err == nil {
			err = AdoptStream(eng, st, hint)
		}
		switch {
		case err == nil:
			return st, skipped, nil
		case errors.Is(err, checkpoint.ErrCorrupt), errors.Is(err, checkpoint.ErrNotFound):
			skipped = append(skipped, err)
		default:
			return nil, skipped, err
		}
	}
	return nil, skipped, nil
}

// Newest loads the newest checkpoint of store that passes every check. Newer
// files that fail are skipped (left in place) and returned in skipped. With no
// good checkpoint it returns a nil checkpoint and no error.
func Newest(store *checkpoint.Store) (c *checkpoint.Checkpoint, skipped []error, err error) {
	c, skipped, err = store.Latest()
	if errors.Is(err, checkpoint.ErrNotFound) {
		return nil, skipped, nil
	}
	return c, skipped, err
}

// ToCheckpoint converts the engine's sections to the checkpoint's type.
func ToCheckpoint(secs []learner.Section) []checkpoint.Section {
	out := make([]checkpoint.Section, len(secs))
	for i, s := range secs {
		out[i] = checkpoint.Section{Global: s.Global, Partition: s.Partition, Bytes: s.Bytes}
	}
	return out
}

// FromCheckpoint converts checkpoint sections to the engine's type.
func FromCheckpoint(secs []checkpoint.Section) []learner.Section {
	out := make([]learner.Section, len(secs))
	for i, s := range secs {
		out[i] = learner.Section{Global: s.Global, Partition: s.Partition, Bytes: s.Bytes}
	}
	return out
}

// PartitionDir is where partition p's checkpoints are kept in a checkpoint
// directory that the instances of a consumer group share: each partition has
// a store of its own, written by whichever instance owns the partition.
func PartitionDir(dir string, p int32) string {
	return filepath.Join(dir, fmt.Sprintf("partition-%05d", p))
}

// SavePartition writes partition p of eng (its keys, high-water mark and
// counters, with the global section) to store, the partition's own, stamped
// with the consumer-group generation in which owner holds it; parent and
// source are as for Save. A writer whose
// generation is older than the store's newest checkpoint is refused
// (checkpoint.ErrFenced): it lost the partition.
func SavePartition(store *checkpoint.Store, eng *learner.Engine, p int32, reason checkpoint.Reason, parent uint64, generation int64, owner string, source any) (checkpoint.Info, error) {
	applied, _, ok := eng.PartitionCounts(p)
	if !ok {
		return checkpoint.Info{}, fmt.Errorf("persist: the engine holds no partition %d", p)
	}
	m := checkpoint.Manifest{Reason: reason, Parent: parent, Events: applied, ConfigSHA256: eng.Config().Digest(), Generation: generation, Owner: owner,
		EventTimes: eventTimes(eng, p)}
	if source != nil {
		b, err := json.Marshal(source)
		if err != nil {
			return checkpoint.Info{}, fmt.Errorf("persist: source record: %w", err)
		}
		m.Source = b
	}
	for _, pos := range eng.Positions() {
		if pos.Partition == p {
			m.Positions = []checkpoint.Position{{Partition: p, Offset: pos.Offset}}
		}
	}
	return store.WriteState(m, func(sink checkpoint.Sink) error { return eng.EncodePartitions(sink, []int32{p}) })
}

// AdoptPartition reads the newest good checkpoint of a partition's store
// (older ones when newer fail their checks, as AdoptNewest) and merges its
// state into eng, which must not hold that partition. It returns the
// checkpoint read, nil when the store holds none (eng unchanged).
func AdoptPartition(store *checkpoint.Store, eng *learner.Engine, hint string) (*checkpoint.Stream, error) {
	part, err := learner.NewEngine(eng.Config())
	if err != nil {
		return nil, err
	}
	st, _, err := AdoptNewest(store, part, hint)
	if err != nil || st == nil {
		return nil, err
	}
	if err := eng.Merge(part); err != nil {
		return nil, fmt.Errorf("persist: checkpoint %d of %s: %w", st.Manifest.Version, store.Dir(), err)
	}
	return st, nil
}
