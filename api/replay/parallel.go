package replay

import (
	"context"
	"fmt"
	"runtime"
	"slices"

	"tidemark/api/intake"
	"tidemark/learner"
)

// ReplayParallel is Replay with the learners spread over workers engines
// (at most one per learner; 0 means one per CPU), each on its own
// goroutine and all fed the same decoded lines. Learners share no state, and
// every figure of the report is computed per learner, so the report is the
// one a single engine with all the learners gives, to the bit
// (TestReplayParallelEqualsSingle). Checkpoints, resume and observers need
// one engine: use Replay for them.
func ReplayParallel(ctx context.Context, h *intake.History, cfg learner.Config, workers int, rc ReplayConfig) (learner.Report, error) {
	if workers <= 0 {
		workers = runtime.NumCPU()
	}
	workers = min(workers, len(cfg.Learners))
	if rc.Checkpoints != nil || rc.Resume || rc.Observe != nil || cfg.Leader.On {
		return learner.Report{}, fmt.Errorf("replay: a parallel replay cannot take checkpoints, resume, observers or a leader (which compares every learner of a key)")
	}
	groups := splitLearners(cfg.Learners, max(workers, 1))
	engines := make([]*learner.Engine, len(groups))
	for i, g := range groups {
		c := cfg
		c.Learners = nil
		for _, j := range g {
			c.Learners = append(c.Learners, cfg.Learners[j])
		}
		eng, err := learner.NewEngine(c)
		if err != nil {
			return learner.Report{}, err
		}
		engines[i] = eng
	}
	rc.Helpers = engines[1:]
	if err := Replay(ctx, h, engines[0], rc); err != nil {
		return learner.Report{}, err
	}
	return mergeReports(cfg, groups, engines), nil
}

// splitLearners assigns learners to n groups, greedily by a rough cost per
// event (k-NN scans its window; the others are cheap), most costly first.
func splitLearners(specs []learner.Spec, n int) [][]int {
	cost := func(s learner.Spec) int {
		if s.Kind == learner.KindKNN {
			if s.KNN.Window.Count > 0 {
				return s.KNN.Window.Count
			}
			return s.KNN.Max / 10
		}
		if s.Kind == learner.KindSlidingRLS {
			return 100
		}
		return 20
	}
	order := make([]int, len(specs))
	for i := range order {
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int { return cost(specs[b]) - cost(specs[a]) })
	groups := make([][]int, n)
	load := make([]int, n)
	for _, i := range order {
		g := slices.Index(load, slices.Min(load))
		groups[g] = append(groups[g], i)
		load[g] += cost(specs[i])
	}
	for i := range groups {
		slices.Sort(groups[i])
	}
	return slices.DeleteFunc(groups, func(g []int) bool { return len(g) == 0 })
}

// mergeReports puts the learners of every engine back in configuration
// order and computes skill against the first mean learner of the whole
// configuration, as one engine would.
func mergeReports(cfg learner.Config, groups [][]int, engines []*learner.Engine) learner.Report {
	out := engines[0].Report(true)
	for _, l := range out.Learners {
		out.StateBytes -= l.StateBytes // what is left is the keys' own share, once
	}
	out.Learners = make([]learner.LearnerReport, len(cfg.Learners))
	for g, eng := range engines {
		for k, l := range eng.Report(true).Learners {
			out.Learners[groups[g][k]] = l
			out.StateBytes += l.StateBytes
		}
	}
	base := slices.IndexFunc(cfg.Learners, func(s learner.Spec) bool { return s.Kind == learner.KindMean })
	for i := range out.Learners {
		l := &out.Learners[i]
		l.Skill = nil
		if base >= 0 {
			b := out.Learners[base]
			l.Skill = learner.Skill(l.Metrics, b.Metrics)
			for k := range l.Keys {
				l.Keys[k].Skill = nil
				if k < len(b.Keys) && b.Keys[k].Key == l.Keys[k].Key {
					l.Keys[k].Skill = learner.Skill(l.Keys[k].Metrics, b.Keys[k].Metrics)
				}
			}
		}
	}
	return out
}
