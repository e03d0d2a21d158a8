package main

import (
	"math"
	"slices"
	"time"
)

// pair is ours against a floor, timed in alternating rounds (paired).
type pair struct {
	ours, floor float64 // medians over the rounds, ns per call
	lo, hi      float64 // the ratio's 10th and 90th percentiles over the rounds
}

func (p pair) ratio() float64 { return p.ours / p.floor }

// paired times ours and floor in alternating short rounds — ours for n
// calls, then the floor for n calls, rounds times — so that load from
// neighbours on a shared machine hits both alike, and returns the medians
// of the per-call times and the spread of the per-round ratio. Each func
// runs its work n times. One warm-up round of each comes first.
func paired(ours, floor func(n int), n, rounds int) pair {
	if quick {
		rounds = max(rounds/4, 5)
	}
	ours(n)
	floor(n)
	var o, f, r []float64
	for range rounds {
		t0 := time.Now()
		ours(n)
		t1 := time.Now()
		floor(n)
		t2 := time.Now()
		a, b := float64(t1.Sub(t0).Nanoseconds())/float64(n), float64(t2.Sub(t1).Nanoseconds())/float64(n)
		o, f, r = append(o, a), append(f, b), append(r, a/b)
	}
	return pair{ours: quantile(o, 0.5), floor: quantile(f, 0.5), lo: quantile(r, 0.1), hi: quantile(r, 0.9)}
}

// roundsOf returns how many calls make a round of about 2 ms, for work of
// about ns per call.
func roundsOf(ns float64) int {
	return max(1, int(math.Round(2e6/ns)))
}

func quantile(xs []float64, q float64) float64 {
	s := slices.Clone(xs)
	slices.Sort(s)
	return s[int(q*float64(len(s)-1)+0.5)]
}
