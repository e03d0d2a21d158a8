package api

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"slices"
	"strconv"
	"time"

	"github.com/labstack/echo/v4"

	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Restore in a consumer group. Each partition has its own checkpoints, so a
// restore names a partition (POST /v1/checkpoints/{version}/restore with
// "partition"), answered by the partition's owner wherever it is asked; or it
// sets every partition back to how it was at one moment (POST
// /v1/cluster/restore with "before"): each partition to its newest good
// checkpoint created at or before that time, each by its owner.
//
// What it promises: each partition's restore happens whole or not at all,
// with exactly-once intake after it, like a restore of one instance. A
// group-wide restore is not one transaction across partitions: the answer
// says, partition by partition, what was restored and what was not (a
// partition moving at that moment answers 503), and asking again restores
// those that were not. After a restore the instances rejoin the group once,
// so that the restored partitions are read again from their positions.

// routeToOwner forwards a restore of partition p to its owner when that is
// another instance, relaying the answer.
func (s *Service) routeToOwner(c echo.Context, p int32, req RestoreRequest) (bool, error) {
	if s.snap.Load().owns(p) {
		return false, nil
	}
	m, ok := s.ownerOf(p)
	switch {
	case !ok:
		return true, unavailable(c, "partition %d is owned by no instance right now (a rebalance in progress); retry shortly", p)
	case s.isSelf(m):
		return true, unavailable(c, "this instance is taking partition %d; retry shortly", p)
	}
	body, _ := json.Marshal(req)
	code, b, err := s.ask(c.Request().Context(), m, http.MethodPost, c.Request().URL.Path, body)
	if err != nil {
		return true, err
	}
	return true, relay(c, code, b)
}

// GroupRestoreRequest is the body of POST /v1/cluster/restore: the moment to
// go back to and how to resume (as RestoreRequest; a skip range applies to
// every partition).
type GroupRestoreRequest struct {
	Before string `json:"before"` // RFC 3339
	RestoreRequest
	// Versions, set by the instance that fans a group-wide restore out,
	// says which version each partition of the receiving instance goes back
	// to. Clients leave it out.
	Versions map[string]uint64 `json:"versions,omitempty"`
}

// GroupRestoreResult answers POST /v1/cluster/restore, partition by partition.
type GroupRestoreResult struct {
	Before     time.Time          `json:"before"`
	Partitions []PartitionRestore `json:"partitions"`
}

// PartitionRestore is one partition's part of a group-wide restore.
type PartitionRestore struct {
	Partition  int32            `json:"partition"`
	Version    uint64           `json:"version,omitempty"` // the version chosen
	Restored   bool             `json:"restored"`
	Checkpoint *checkpoint.Info `json:"checkpoint,omitempty"` // recording the restore
	Instance   string           `json:"instance,omitempty"`   // its owner, which restored it
	Error      string           `json:"error,omitempty"`
}

func (s *Service) handleGroupRestore(c echo.Context) error {
	if s.kafka == nil {
		return httpErr(http.StatusNotFound, "this service does not read Kafka, so it belongs to no consumer group; restore with POST /v1/checkpoints/{version}/restore")
	}
	var req GroupRestoreRequest
	if err := decodeJSONBody(c, &req); err != nil {
		return httpErr(http.StatusBadRequest, "the body must be one object {\"before\":\"2026-03-10T10:00:00Z\",\"resume\":…}: %v", errMessage(err))
	}
	req.Partition = nil
	if req.Versions != nil && c.Request().Header.Get(forwardedHeader) != "" {
		return s.restoreMine(c, req)
	}
	before, err := time.Parse(time.RFC3339Nano, req.Before)
	if err != nil {
		return httpErr(http.StatusBadRequest, "before %q: want an RFC 3339 time, e.g. 2026-03-10T10:00:00Z: every partition goes back to its newest checkpoint created at or before it", req.Before)
	}
	if _, _, err := req.rule(nil); err != nil {
		return httpErr(http.StatusBadRequest, "%v", err)
	}
	n := s.kafka.Partitions()
	if n == 0 {
		return unavailable(c, "the topic's partitions are not known yet; retry shortly")
	}
	out := GroupRestoreResult{Before: before.UTC(), Partitions: []PartitionRestore{}}
	byOwner := map[string][]int{} // member ID → indexes into out.Partitions
	owners := map[string]intake.Member{}
	for p := range int32(n) {
		pr := PartitionRestore{Partition: p}
		v, err := s.newestBefore(p, before)
		switch {
		case err != nil:
			pr.Error = err.Error()
		case v == 0:
			pr.Error = fmt.Sprintf("no good checkpoint created at or before %s", before.UTC().Format(time.RFC3339))
		default:
			pr.Version = v
			if m, ok := s.ownerOf(p); !ok {
				pr.Error = "owned by no instance right now (a rebalance in progress); ask again"
			} else {
				owners[m.ID] = m
				byOwner[m.ID] = append(byOwner[m.ID], len(out.Partitions))
			}
		}
		out.Partitions = append(out.Partitions, pr)
	}
	for id, idx := range byOwner {
		m := owners[id]
		sub := GroupRestoreRequest{RestoreRequest: req.RestoreRequest, Versions: map[string]uint64{}}
		for _, i := range idx {
			sub.Versions[strconv.Itoa(int(out.Partitions[i].Partition))] = out.Partitions[i].Version
		}
		body, _ := json.Marshal(sub)
		var code int
		var b []byte
		var err error
		if s.isSelf(m) {
			code, b, err = s.askSelf(c, http.MethodPost, "/v1/cluster/restore", body)
		} else {
			code, b, err = s.ask(c.Request().Context(), m, http.MethodPost, "/v1/cluster/restore", body)
		}
		var mine GroupRestoreResult
		if err == nil && code == http.StatusOK {
			err = json.Unmarshal(b, &mine)
		} else if err == nil {
			err = fmt.Errorf("answered %d: %s", code, errorText(b))
		}
		for _, i := range idx {
			pr := &out.Partitions[i]
			pr.Instance = m.Instance
			if err != nil {
				pr.Error = errMessage(err)
				continue
			}
			j := slices.IndexFunc(mine.Partitions, func(x PartitionRestore) bool { return x.Partition == pr.Partition })
			if j < 0 {
				pr.Error = "the owner did not answer for it"
				continue
			}
			pr.Restored, pr.Checkpoint, pr.Error = mine.Partitions[j].Restored, mine.Partitions[j].Checkpoint, mine.Partitions[j].Error
		}
	}
	return c.JSON(http.StatusOK, out)
}

// restoreMine restores the partitions a group-wide restore asked this
// instance to.
func (s *Service) restoreMine(c echo.Context, req GroupRestoreRequest) error {
	versions := map[int32]uint64{}
	for k, v := range req.Versions {
		p, err := strconv.ParseInt(k, 10, 32)
		if err != nil {
			return httpErr(http.StatusBadRequest, "versions: partition %q is not a number", k)
		}
		versions[int32(p)] = v
	}
	var results map[int32]cmdResult
	s.loop.do(func(l *loop) cmdResult { results = l.restoreParts(versions, req.RestoreRequest); return cmdResult{} })
	out := GroupRestoreResult{Partitions: []PartitionRestore{}}
	for p, res := range results {
		pr := PartitionRestore{Partition: p, Version: versions[p], Restored: res.err == nil, Instance: s.loop.group.instance}
		if res.err != nil {
			pr.Error = res.err.Error()
		} else {
			info := res.info
			pr.Checkpoint = &info
		}
		out.Partitions = append(out.Partitions, pr)
	}
	slices.SortFunc(out.Partitions, func(a, b PartitionRestore) int { return int(a.Partition - b.Partition) })
	return c.JSON(http.StatusOK, out)
}

// newestBefore returns the newest version of partition p's store that
// passes its checks and was created at or before t (0: none), reading the
// shared checkpoint directory.
func (s *Service) newestBefore(p int32, t time.Time) (uint64, error) {
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: persist.PartitionDir(s.cfg.CheckpointDir, p), ReadOnly: true, FS: s.cfg.CheckpointFS})
	if err != nil {
		return 0, nil // no store: the partition never had events
	}
	defer store.Close()
	list, err := store.List()
	if err != nil {
		return 0, err
	}
	var best uint64
	for _, in := range list {
		if in.Error == "" && !in.Created.After(t) && in.Version > best {
			best = in.Version
		}
	}
	return best, nil
}

// previewRestore counts what restoring version v as req asks would do — the
// events after the checkpoint up to the live position that it would replay,
// leave out or forget — reading the source and changing nothing. It refuses,
// as the restore would, a skip its checkpoint already holds.
func (s *Service) previewRestore(ctx context.Context, v uint64, req RestoreRequest) (RestorePreview, error) {
	var m checkpoint.Manifest
	var live []learner.Position
	var mode ResumeMode
	var rule *skipRule
	res := s.loop.do(func(l *loop) cmdResult {
		store := l.store
		live = l.eng.Positions()
		if l.group != nil {
			if req.Partition == nil || l.group.owned[*req.Partition] == nil {
				return cmdResult{err: cmdErr(ErrInvalidRequest, "in a consumer group, name a partition this instance owns (\"partition\": N)")}
			}
			store = l.group.owned[*req.Partition].store
			live = slices.DeleteFunc(live, func(p learner.Position) bool { return p.Partition != *req.Partition })
		}
		var err error
		if mode, rule, err = req.rule(live); err != nil {
			return cmdResult{err: cmdErr(ErrInvalidRequest, "%v", err)}
		}
		if m, err = store.ReadManifest(v); errors.Is(err, checkpoint.ErrNotFound) {
			return cmdResult{err: cmdErr(ErrNoCheckpoint, "checkpoint %d does not exist; GET /v1/checkpoints lists them", v)}
		} else if err != nil {
			return cmdResult{err: cmdErr(ErrConflict, "checkpoint %d cannot be read: %v", v, err).withCause(err)}
		}
		list, _ := store.List()
		return cmdResult{err: skipReaches(m, rule, list)}
	})
	if res.err != nil {
		return RestorePreview{}, res.err
	}
	p := RestorePreview{DryRun: true, Restore: v, Resume: mode.String(), To: live}
	for _, q := range m.Positions {
		p.From = append(p.From, learner.Position{Partition: q.Partition, Offset: q.Offset})
	}
	err := intake.Scan(ctx, s.loop.src, p.From, live, func(pos learner.Position, b []byte) {
		switch {
		case mode == ResumeFromNow:
			p.Forget++
		case rule != nil && rule.coversPosition(pos):
			p.Skip++
		case rule != nil && rule.HasTime:
			var ev learner.Event
			if b != nil && learner.DecodeEvent(b, &ev) == nil && rule.coversEvent(pos, &ev) {
				p.Skip++
			} else {
				p.Replay++
			}
		default:
			p.Replay++
		}
	})
	if err != nil {
		return p, cmdErr(ErrNotStored, "the events after checkpoint %d could not be read back to count them: %v", v, err).withCause(err)
	}
	return p, nil
}
