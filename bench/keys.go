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
	// On disk before anything is timed: the kernel writing 400 MB back in
	// the background would otherwise share the disk with the checkpoint's
	// sync (a write measured at 5.2 s once, against 2.5–3 s).
	if err := f.Sync(); err != nil {
		return err
	}
	return f.Close()
}

// replayChild is the child's side: replay path and print events/s and the
// keys; with ckDir, then write the state as a checkpoint there and the same
// number of bytes to a plain file (the floor), and print the two times in
// seconds and the file's size. Loading is timed in a process of its own
// (loadChild), as a restarted service loads.
func replayChild(path, ckDir string) {
	eng, err := learner.NewEngine(keysConfig())
	if err != nil {
		fail(err)
	}
	h, err := intake.OpenHistory(path)
	if err != nil {
		fail(err)
	}
	t0 := time.Now()
	if err := replay.Replay(context.Background(), h, eng, replay.ReplayConfig{}); err != nil {
		fail(err)
	}
	rate := float64(eng.Applied()) / time.Since(t0).Seconds()
	if ckDir == "" {
		fmt.Println(rate, eng.Report(false).Keys)
		return
	}
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: ckDir})
	if err != nil {
		fail(err)
	}
	defer store.Close()
	keys := eng.Report(false).Keys
	t0 = time.Now()
	info, err := persist.Save(store, eng, checkpoint.Manual, 0, nil)
	if err != nil {
		fail(err)
	}
	ckWrite := time.Since(t0).Seconds()
	eng = nil
	runtime.GC()
	floor, err := writeFloor(ckDir, info.Bytes)
	if err != nil {
		fail(err)
	}
	fmt.Println(rate, keys, ckWrite, floor, info.Bytes)
}

// loadChild is the child's side of the load: in a fresh process, adopt the
// newest checkpoint in dir as a service does when it starts (its digest
// checked while it decodes), and print the seconds it took and the keys.
func loadChild(dir string) {
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: dir, ReadOnly: true})
	if err != nil {
		fail(err)
	}
	defer store.Close()
	t0 := time.Now()
	eng, err := learner.NewEngine(keysConfig())
	var c *checkpoint.Stream
	if err == nil {
		c, _, err = persist.AdoptNewest(store, eng, "")
	}
	if err == nil && c == nil {
		err = fmt.Errorf("no checkpoint in %s", dir)
	}
	if err != nil {
		fail(err)
	}
	fmt.Println(time.Since(t0).Seconds(), eng.Report(false).Keys)
}

func keysConfig() learner.Config {
	var specs []learner.Spec
	for _, s := range keysSpecs {
		sp, _ := learner.ParseSpec(s)
		specs = append(specs, sp)
	}
	return learner.Config{Learners: specs, MaxKeys: 2_000_000}
}

func fail(err error) {
	fmt.Fprintln(os.Stderr, err)
	os.Exit(1)
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
	rssMB, loadRSSMB       float64
	ckWrite, ckLoad, floor float64 // seconds
	ckBytes                int64
}

func runKeysChild(path, ckDir string) (keysRun, error) {
	args := []string{"-replay-child", path}
	if ckDir != "" {
		args = append(args, "-checkpoint-dir", ckDir)
	}
	out, rss, err := runChild(args...)
	if err != nil {
		return keysRun{}, err
	}
	r := keysRun{rssMB: rss}
	f := strings.Fields(out)
	if _, err := fmt.Sscan(strings.Join(f[:min(2, len(f))], " "), &r.rate, &r.keys); err != nil {
		return keysRun{}, fmt.Errorf("child said %q: %v", out, err)
	}
	if len(f) == 5 {
		fmt.Sscan(strings.Join(f[2:], " "), &r.ckWrite, &r.floor, &r.ckBytes)
	}
	if ckDir != "" {
		out, r.loadRSSMB, err = runChild("-load-child", ckDir)
		if err != nil {
			return keysRun{}, err
		}
		var keys int
		if _, err := fmt.Sscan(out, &r.ckLoad, &keys); err != nil || keys != r.keys {
			return keysRun{}, fmt.Errorf("load child said %q (%v), want %d keys", out, err, r.keys)
		}
	}
	return r, nil
}

// runChild runs this program with args and returns what it printed and its
// peak memory (getrusage's maximum resident set) in MiB.
func runChild(args ...string) (string, float64, error) {
	exe, err := os.Executable()
	if err != nil {
		return "", 0, err
	}
	cmd := exec.Command(exe, args...)
	cmd.Stderr = os.Stderr
	out, err := cmd.Output()
	if err != nil {
		return "", 0, err
	}
	rss := 0.0
	if ru, ok := cmd.ProcessState.SysUsage().(*syscall.Rusage); ok {
		rss = float64(ru.Maxrss) / 1024 // kilobytes on Linux
	}
	return string(out), rss, nil
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
		"  checkpoint of the %d-key state, %.0f MiB file: write %.2f s, load in a fresh process %.2f s (peak RSS %.0f MiB) "+
		"(target < 5 s each: %s); writing and syncing the same bytes %.2f s: write/floor %.1f\n",
		n, strings.Join(keysSpecs, " + "), best[0].rate, best[0].rssMB, best[1].keys, best[1].rate, best[1].rssMB, ratio, verdict,
		ck.keys, float64(ck.ckBytes)/(1<<20), ck.ckWrite, ck.ckLoad, ck.loadRSSMB, ckVerdict, ck.floor, ck.ckWrite/ck.floor)
}
