package main

import (
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"time"

	"tidemark/learner"
)

// driftDetectors is issue 16's comparison of the drift detectors, on the
// series the engine watches — absolute prequential errors — drawn as |N(0,
// 1)| for 5 000 events and then |N(0, s²)|: for each rise s, the events
// from the shift to the first alarm (median over 50 seeds), alarms before
// the shift (false, over the 50 × 5 000 events), and each detector's cost
// per value.
func driftDetectors() string {
	type det interface {
		Add(float64) bool
	}
	makers := []struct {
		name string
		make func() det
	}{
		{"page-hinkley", func() det { return learner.NewPageHinkley(learner.DriftConfig{}) }},
		{"adwin", func() det { return learner.NewADWIN(0, 0) }},
	}
	var b strings.Builder
	fmt.Fprintln(&b, "drift detectors on |N(0, 1)| then |N(0, s²)|: median delay to the first alarm (50 seeds), false alarms before the shift, cost")
	for _, mk := range makers {
		fmt.Fprintf(&b, "  %-13s", mk.name)
		false0 := 0
		for _, s := range []float64{1.5, 2, 3} {
			var delays []int
			for seed := range 50 {
				d := mk.make()
				rng := rand.New(rand.NewPCG(uint64(seed), 1))
				for i := 0; i < 5000; i++ {
					if d.Add(math.Abs(rng.NormFloat64())) && s == 1.5 {
						false0++
					}
				}
				delay := 0
				for delay < 20000 {
					delay++
					if d.Add(math.Abs(s * rng.NormFloat64())) {
						break
					}
				}
				delays = append(delays, delay)
			}
			fmt.Fprintf(&b, "  s=%.1f: %5d", s, median(delays))
		}
		d := mk.make()
		rng := rand.New(rand.NewPCG(9, 9))
		const n = 1_000_000
		xs := make([]float64, 4096)
		for i := range xs {
			xs[i] = math.Abs(rng.NormFloat64())
		}
		t0 := time.Now()
		for i := 0; i < n; i++ {
			d.Add(xs[i&4095])
		}
		fmt.Fprintf(&b, "   false alarms %d in 250 000 events   %.0f ns/value\n", false0, float64(time.Since(t0).Nanoseconds())/n)
	}
	return b.String()
}

func median(xs []int) int {
	s := append([]int(nil), xs...)
	for i := range s {
		for j := i + 1; j < len(s); j++ {
			if s[j] < s[i] {
				s[i], s[j] = s[j], s[i]
			}
		}
	}
	return s[len(s)/2]
}
