package main

import (
	"bufio"
	"context"
	"fmt"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strconv"
	"strings"
	"syscall"
	"time"

	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/api/replay"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Issue 13's scale case: a replay of n events spread over k keys with
// rls (d = 8) and mean:window=100, against the same events all on one key.
// Each run is a child process of this one, so that its peak memory is its
// own (getrusage's maximum resident set); the two are run in turn, twice.

var keysSpecs = []string{"rls:forget=0.99", "mean:window=100"}

// writeKeysHistory writes n events over k keys with eight numeric features,
// one event a second: each run of k events visits every key once, in an
// order shuffled afresh for each run (so that memory is not walked in the
// order it was allocated).
func writeKeysHistory(path string, n, k int) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	w := bufio.NewWriterSize(f, 1<<20)
	rng := rand.New(rand.NewPCG(13, uint64(k)))
	t0 := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	var b []byte
	var perm []int
	for i := 0; i < n; i++ {
		if i%k == 0 {
			perm = rng.Perm(k)
		}
		key := uint64(perm[i%k])
		b = append(b[:0], `{"time":"`...)
		b = t0.Add(time.Duration(i)*time.Second).AppendFormat(b, time.RFC3339)
		b = append(b, `","key":"meter-`...)
		b = strconv.AppendUint(b, key, 10)
		b = append(b, `","features":{`...)
		y := 0.0
		for j := 0; j < 8; j++ {
			v := rng.NormFloat64()
			y += float64(j+1) * v
			if j > 0 {
				b = append(b, ',')
			}
			b = append(b, `"x`...)
			b = strconv.AppendInt(b, int64(j), 10)
			b = append(b, `":`...)
			b = strconv.AppendFloat(b, v, 'g', 6, 64)
		}
		b = append(b, `},"target":`...)
		b = strconv.AppendFloat(b, y+rng.NormFloat64(), 'g', 6, 64)
		b = append(b, "}\n"...)
		w.Write(b)
	}
	if err := w.Flush(); err != nil {
		return err
	}
	return f.Close()
}

// replayChild is the child's side: replay path and print events/s and the
// keys; with ckDir, then write the state as a checkpoint there, load it into
// a fresh engine and write the same number of bytes to a plain file (the
// floor), and print the three times in seconds and the file's size.
func replayChild(path, ckDir string) {
	var specs []learner.Spec
	for _, s := range keysSpecs {
		sp, _ := learner.ParseSpec(s)
		specs = append(specs, sp)
	}
	eng, err := learner.NewEngine(learner.Config{Learners: specs, MaxKeys: 2_000_000})
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	h, err := intake.OpenHistory(path)
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	t0 := time.Now()
	if err := replay.Replay(context.Background(), h, eng, replay.ReplayConfig{}); err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	rate := float64(eng.Applied()) / time.Since(t0).Seconds()
	if ckDir == "" {
		fmt.Println(rate, eng.Report(false).Keys)
		return
	}
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: ckDir})
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	defer store.Close()
	keys, cfg := eng.Report(false).Keys, eng.Config()
	t0 = time.Now()
	info, err := persist.Save(store, eng, checkpoint.Manual, 0, nil)
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	ckWrite := time.Since(t0).Seconds()
	// Load as a restarted service does: into an empty process, the engine
	// that wrote it gone.
	eng = nil
	runtime.GC()
	t0 = time.Now()
	// As a service starts: the newest checkpoint, its digest checked while
	// it decodes.
	fresh, err := learner.NewEngine(cfg)
	var c *checkpoint.Checkpoint
	if err == nil {
		c, _, err = persist.AdoptNewest(store, fresh, "")
	}
	if err == nil && (c == nil || c.Manifest.Version != info.Version) {
		err = fmt.Errorf("adopted %v, not version %d", c, info.Version)
	}
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	ckLoad := time.Since(t0).Seconds()
	c, fresh = nil, nil
	runtime.GC()
	floor, err := writeFloor(ckDir, info.Bytes)
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	fmt.Println(rate, keys, ckWrite, ckLoad, floor, info.Bytes)
}

// writeFloor writes and syncs n bytes to a new file in dir: the floor of a
// checkpoint write of n bytes.
func writeFloor(dir string, n int64) (floor float64, err error) {
	buf := make([]byte, 1<<20)
	t0 := time.Now()
	f, err := os.Create(filepath.Join(dir, "floor"))
	if err != nil {
		return
	}
	for left := n; left > 0; left -= int64(len(buf)) {
		if _, err = f.Write(buf[:min(left, int64(len(buf)))]); err != nil {
			return
		}
	}
	if err = f.Sync(); err != nil {
		return
	}
	f.Close()
	floor = time.Since(t0).Seconds()
	return
}

type keysRun struct {
	rate                   float64 // events/s
	keys                   int
	rssMB                  float64
	ckWrite, ckLoad, floor float64 // seconds
	ckBytes                int64
}

func runKeysChild(path, ckDir string) (keysRun, error) {
	exe, err := os.Executable()
	if err != nil {
		return keysRun{}, err
	}
	args := []string{"-replay-child", path}
	if ckDir != "" {
		args = append(args, "-checkpoint-dir", ckDir)
	}
	cmd := exec.Command(exe, args...)
	cmd.Stderr = os.Stderr
	out, err := cmd.Output()
	if err != nil {
		return keysRun{}, err
	}
	var r keysRun
	f := strings.Fields(string(out))
	if _, err := fmt.Sscan(strings.Join(f[:min(2, len(f))], " "), &r.rate, &r.keys); err != nil {
		return keysRun{}, fmt.Errorf("child said %q: %v", out, err)
	}
	if len(f) == 6 {
		fmt.Sscan(strings.Join(f[2:], " "), &r.ckWrite, &r.ckLoad, &r.floor, &r.ckBytes)
	}
	if ru, ok := cmd.ProcessState.SysUsage().(*syscall.Rusage); ok {
		r.rssMB = float64(ru.Maxrss) / 1024 // kilobytes on Linux
	}
	return r, nil
}

// keysScale runs the case and returns its lines for the report.
func keysScale() string {
	n, k := 2_000_000, 1_000_000
	if quick {
		n, k = 400_000, 200_000
	}
	dir, err := os.MkdirTemp("", "tidemark-keys")
	if err != nil {
		return "keys: " + err.Error()
	}
	defer os.RemoveAll(dir)
	one, many := filepath.Join(dir, "one.ndjson"), filepath.Join(dir, "many.ndjson")
	if err := writeKeysHistory(one, n, 1); err != nil {
		return "keys: " + err.Error()
	}
	if err := writeKeysHistory(many, n, k); err != nil {
		return "keys: " + err.Error()
	}
	var best [2]keysRun
	for rep := 0; rep < 2; rep++ {
		for i, p := range []string{one, many} {
			r, err := runKeysChild(p, "")
			if err != nil {
				return "keys: " + err.Error()
			}
			if r.rate > best[i].rate {
				best[i] = r
			}
		}
	}
	ratio := best[1].rate / best[0].rate
	verdict := "ok"
	if ratio < 0.5 || best[1].rssMB > 2048 {
		verdict = "MISSED"
	}
	// The checkpoint of the many-key state, in a run of its own (its peak
	// memory is not the replay's).
	ck, err := runKeysChild(many, filepath.Join(dir, "checkpoints"))
	if err != nil {
		return "keys: checkpoint: " + err.Error()
	}
	ckVerdict := "ok"
	if ck.ckWrite > 5 || ck.ckLoad > 5 {
		ckVerdict = "MISSED"
	}
	return fmt.Sprintf("keys: replay of %d events, %s, child processes, better of two runs each\n"+
		"  1 key:        %8.0f events/s, peak RSS %6.0f MiB\n"+
		"  %7d keys: %8.0f events/s, peak RSS %6.0f MiB\n"+
		"  ratio %.2f of the 1-key rate (target ≥ 0.5), peak RSS target < 2048 MiB: %s\n"+
		"  checkpoint of the %d-key state, %.0f MiB file: write %.2f s, load %.2f s (target < 5 s each: %s); "+
		"writing and syncing the same bytes %.2f s: write/floor %.1f\n",
		n, strings.Join(keysSpecs, " + "), best[0].rate, best[0].rssMB, best[1].keys, best[1].rate, best[1].rssMB, ratio, verdict,
		ck.keys, float64(ck.ckBytes)/(1<<20), ck.ckWrite, ck.ckLoad, ckVerdict, ck.floor, ck.ckWrite/ck.floor)
}
