package main

import (
	"bufio"
	"encoding/binary"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"tidemark/learner"
)

// kdtreeScript builds scipy's cKDTree over the window and answers, per
// line "N" on stdin, the nanoseconds per call of N single-row queries
// (k = 10), cycling through the queries.
const kdtreeScript = `
import sys, time, numpy as np
from scipy.spatial import cKDTree
w, d, nq = int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
a = np.fromfile(sys.argv[1], dtype='<f8')
rows, qs = a[:w*d].reshape(w, d), a[w*d:].reshape(nq, d)
tree = cKDTree(rows)
i = 0
for line in sys.stdin:
    n = int(line)
    t0 = time.perf_counter_ns()
    for _ in range(n):
        tree.query(qs[i % nq], k=10)
        i += 1
    print((time.perf_counter_ns() - t0) / n, flush=True)
`

// kdtreeCompare times our k-NN predict (scale=none: plain Euclidean
// distance, as the tree's) against scipy's cKDTree.query on the same
// window and queries, one call at a time each, in alternating rounds. It
// needs Debian's python3-scipy (/usr/bin/python3) and says so without it.
func kdtreeCompare() string {
	const w, d = 10_000, 8
	py := "/usr/bin/python3"
	if err := exec.Command(py, "-c", "import scipy.spatial").Run(); err != nil {
		return "k-NN against a kd-tree: skipped — install Debian's python3-scipy (apt-get install python3-scipy) to compare with cKDTree.query\n"
	}
	s, _ := learner.ParseSpec("knn:k=10,window=" + strconv.Itoa(w) + ",scale=none")
	m := learner.New(&s, d)
	rows := randRows(w+256, d, 1)
	dir, err := os.MkdirTemp("", "tidemark-kdtree-")
	if err != nil {
		panic(err)
	}
	defer os.RemoveAll(dir)
	var buf []byte
	for i, r := range rows {
		if i < w {
			m.Learn(r, r[0], 0)
		}
		for _, v := range r {
			buf = binary.LittleEndian.AppendUint64(buf, math.Float64bits(v))
		}
	}
	path := filepath.Join(dir, "window.f64")
	if err := os.WriteFile(path, buf, 0o600); err != nil {
		panic(err)
	}
	cmd := exec.Command(py, "-c", kdtreeScript, path, strconv.Itoa(w), strconv.Itoa(d), "256")
	in, _ := cmd.StdinPipe()
	outp, _ := cmd.StdoutPipe()
	cmd.Stderr = os.Stderr
	if err := cmd.Start(); err != nil {
		return fmt.Sprintf("k-NN against a kd-tree: skipped — %v\n", err)
	}
	defer func() { in.Close(); cmd.Wait() }()
	out := bufio.NewScanner(outp)
	qs := rows[w:]
	i := 0
	ours := func(n int) {
		for range n {
			m.Predict(qs[i%len(qs)])
			i++
		}
	}
	var treeNs []float64
	tree := func(n int) {
		fmt.Fprintln(in, n)
		if !out.Scan() {
			panic("the kd-tree process stopped")
		}
		v, _ := strconv.ParseFloat(strings.TrimSpace(out.Text()), 64)
		treeNs = append(treeNs, v)
	}
	rounds := 31
	if quick {
		rounds = 9
	}
	ours(50)
	tree(50)
	treeNs = treeNs[:0]
	var oursNs, ratios []float64
	for range rounds {
		t0 := time.Now()
		ours(50)
		o := float64(time.Since(t0).Nanoseconds()) / 50
		tree(50)
		oursNs = append(oursNs, o)
		ratios = append(ratios, o/treeNs[len(treeNs)-1])
	}
	return fmt.Sprintf("k-NN against a kd-tree (W = %d, d = %d, k = 10, one query a call, %d alternating rounds of 50): ours %.1f µs, scipy %s cKDTree.query %.1f µs: %.2f× (p10–p90 %.2f–%.2f)\n",
		w, d, rounds, quantile(oursNs, 0.5)/1e3, scipyVersion(py), quantile(treeNs, 0.5)/1e3, quantile(ratios, 0.5), quantile(ratios, 0.1), quantile(ratios, 0.9))
}

func scipyVersion(py string) string {
	b, err := exec.Command(py, "-c", "import scipy; print(scipy.__version__)").Output()
	if err != nil {
		return "?"
	}
	return strings.TrimSpace(string(b))
}
