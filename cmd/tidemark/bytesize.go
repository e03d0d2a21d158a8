package main

import (
	"fmt"
	"os"
	"strconv"
	"strings"
)

// byteSize is a flag value of bytes: a number with an optional unit B, KiB,
// MiB, GiB, TiB (powers of 1024) or KB, MB, GB, TB (powers of 1000).
type byteSize int64

var byteUnits = []struct {
	suffix string
	mult   int64
}{
	{"KiB", 1 << 10}, {"MiB", 1 << 20}, {"GiB", 1 << 30}, {"TiB", 1 << 40},
	{"KB", 1e3}, {"MB", 1e6}, {"GB", 1e9}, {"TB", 1e12}, {"B", 1},
}

func (b *byteSize) Set(s string) error {
	t := strings.TrimSpace(s)
	mult := int64(1)
	for _, u := range byteUnits {
		if strings.HasSuffix(strings.ToUpper(t), strings.ToUpper(u.suffix)) {
			t, mult = strings.TrimSpace(t[:len(t)-len(u.suffix)]), u.mult
			break
		}
	}
	v, err := strconv.ParseFloat(t, 64)
	if err != nil || v < 0 || v*float64(mult) > 1<<62 {
		return fmt.Errorf("%q is not a size: want a number of bytes with an optional unit, e.g. 8GiB or 512MiB", s)
	}
	*b = byteSize(v * float64(mult))
	return nil
}

func (b *byteSize) String() string {
	n := int64(*b)
	for _, u := range []struct {
		suffix string
		mult   int64
	}{{"TiB", 1 << 40}, {"GiB", 1 << 30}, {"MiB", 1 << 20}, {"KiB", 1 << 10}} {
		if n >= u.mult && n%u.mult == 0 {
			return strconv.FormatInt(n/u.mult, 10) + u.suffix
		}
		if n >= u.mult {
			return strconv.FormatFloat(float64(n)/float64(u.mult), 'f', 1, 64) + u.suffix
		}
	}
	return strconv.FormatInt(n, 10)
}

// defaultMemoryBudget is half of this machine's memory (MemTotal in
// /proc/meminfo), or 0 (no budget) where that cannot be read.
func defaultMemoryBudget() int64 {
	b, err := os.ReadFile("/proc/meminfo")
	if err != nil {
		return 0
	}
	for _, line := range strings.Split(string(b), "\n") {
		if f := strings.Fields(line); len(f) >= 2 && f[0] == "MemTotal:" {
			kb, err := strconv.ParseInt(f[1], 10, 64)
			if err != nil {
				return 0
			}
			return kb << 10 / 2
		}
	}
	return 0
}
