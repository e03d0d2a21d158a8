package main

import (
	"bytes"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"tidemark/bench/synth"
	"tidemark/checkpoint"
)

// kindsSpecs covers all four kinds, count and time windows, forgetting by
// factor and by half-life.
var kindsSpecs = []string{
	"knn:k=5,window=100", "knn:k=3,window=6h,weight=inverse", "rls:forget=0.99", "rls:half_life=12h,degree=2",
	"sliding-rls:window=80", "sliding-rls:window=3h", "mean", "mean:window=2h",
}

func replayArgs(history, dir string, extra ...string) []string {
	args := []string{"replay", "--history", history, "--json", "--time-features", "--hash-buckets", "4"}
	for _, s := range kindsSpecs {
		args = append(args, "--learner", s)
	}
	if dir != "" {
		args = append(args, "--checkpoints", dir, "--every", "97")
	}
	return append(args, extra...)
}

func mustRun(t *testing.T, args ...string) string {
	t.Helper()
	var stdout, stderr bytes.Buffer
	if code := run(args, &stdout, &stderr); code != 0 {
		t.Fatalf("%v: exit %d: %s", args, code, stderr.String())
	}
	return stdout.String()
}

func newest(t *testing.T, dir string) checkpoint.Info {
	t.Helper()
	var list []checkpoint.Info
	if err := json.Unmarshal([]byte(mustRun(t, "checkpoints", "list", dir, "--json")), &list); err != nil {
		t.Fatal(err)
	}
	return list[len(list)-1]
}

func writeHistory(t *testing.T, days int) (path string, lines []string) {
	t.Helper()
	var buf bytes.Buffer
	if _, err := synth.Write(&buf, synth.Config{Days: days, Seed: 3}); err != nil {
		t.Fatal(err)
	}
	path = filepath.Join(t.TempDir(), "history.ndjson")
	os.WriteFile(path, buf.Bytes(), 0o600)
	return path, strings.SplitAfter(buf.String(), "\n")
}

// TestResumeIsIndistinguishable: a replay interrupted after K lines — with its
// final checkpoint (a clean stop) or without it (a crash after the last
// periodic one) — and resumed on the whole history ends with the same report,
// every digit, and the same state_sha256 as a run that was never interrupted.
func TestResumeIsIndistinguishable(t *testing.T) {
	path, lines := writeHistory(t, 3) // 3 rooms × 864 readings + 5 malformed lines
	fullDir := t.TempDir()
	want := mustRun(t, replayArgs(path, fullDir)...)
	wantState := newest(t, fullDir).StateSHA256
	for i, k := range []int{1, 96, 97, 500, 1299, 2000, len(lines) - 2} {
		crash := i%2 == 1
		dir := t.TempDir()
		prefix := filepath.Join(t.TempDir(), "prefix.ndjson")
		os.WriteFile(prefix, []byte(strings.Join(lines[:k], "")), 0o600)
		mustRun(t, replayArgs(prefix, dir)...)
		if crash {
			last := newest(t, dir)
			if last.Reason != checkpoint.Final {
				t.Fatalf("newest checkpoint is %s, want final", last.Reason)
			}
			os.Remove(filepath.Join(dir, last.File))
		}
		got := mustRun(t, replayArgs(path, dir, "--resume")...)
		if got != want {
			t.Errorf("interrupted after %d lines (crash %v): report differs from the uninterrupted run", k, crash)
		}
		if st := newest(t, dir).StateSHA256; st != wantState {
			t.Errorf("interrupted after %d lines (crash %v): state_sha256 %s, uninterrupted %s", k, crash, st, wantState)
		}
	}
}

func TestResumeRefusals(t *testing.T) {
	path, lines := writeHistory(t, 1)
	dir := t.TempDir()
	mustRun(t, replayArgs(path, dir)...)

	other := []string{"replay", "--history", path, "--checkpoints", dir, "--resume", "--learner", "rls:forget=0.9"}
	var stdout, stderr bytes.Buffer
	if code := run(other, &stdout, &stderr); code != 2 || !strings.Contains(stderr.String(), "was taken with learners") ||
		!strings.Contains(stderr.String(), "rls:forget=0.9") {
		t.Errorf("other learners: exit %d, %s", code, stderr.String())
	}

	changed := append([]string(nil), lines...)
	changed[10] = strings.Replace(changed[10], `"target":`, `"target":1`, 1)
	edited := filepath.Join(t.TempDir(), "edited.ndjson")
	os.WriteFile(edited, []byte(strings.Join(changed, "")), 0o600)
	stderr.Reset()
	if code := run(replayArgs(edited, dir, "--resume"), &stdout, &stderr); code != 2 || !strings.Contains(stderr.String(), "does not extend") {
		t.Errorf("edited history: exit %d, %s", code, stderr.String())
	}

	short := filepath.Join(t.TempDir(), "short.ndjson")
	os.WriteFile(short, []byte(strings.Join(lines[:50], "")), 0o600)
	stderr.Reset()
	if code := run(replayArgs(short, dir, "--resume"), &stdout, &stderr); code != 2 || !strings.Contains(stderr.String(), "has 50 lines") {
		t.Errorf("shorter history: exit %d, %s", code, stderr.String())
	}
}

func TestVerifyCatchesFlipAndTruncation(t *testing.T) {
	path, _ := writeHistory(t, 1)
	dir := t.TempDir()
	mustRun(t, replayArgs(path, dir)...)
	list := mustRun(t, "checkpoints", "verify", dir)
	if !strings.Contains(list, "version 1: ok") {
		t.Fatalf("verify on good files: %s", list)
	}
	n := newest(t, dir).Version // corrupt the two newest: a flipped byte and a truncation
	fFlip := filepath.Join(dir, checkpoint.FileName(n-1))
	b, _ := os.ReadFile(fFlip)
	b[len(b)/3] ^= 0x10
	os.WriteFile(fFlip, b, 0o600)
	fCut := filepath.Join(dir, checkpoint.FileName(n))
	b2, _ := os.ReadFile(fCut)
	os.WriteFile(fCut, b2[:len(b2)-100], 0o600)
	var stdout, stderr bytes.Buffer
	code := run([]string{"checkpoints", "verify", dir}, &stdout, &stderr)
	if code == 0 || !strings.Contains(stdout.String(), fmt.Sprintf("version %d: FAILED", n-1)) ||
		!strings.Contains(stdout.String(), fmt.Sprintf("version %d: FAILED", n)) ||
		!strings.Contains(stderr.String(), fmt.Sprintf("version %d, %d", n-1, n)) {
		t.Errorf("verify: exit %d\n%s\n%s", code, stdout.String(), stderr.String())
	}
	stdout.Reset()
	if code := run([]string{"checkpoints", "verify", dir, fmt.Sprint(n)}, &stdout, &stderr); code == 0 || !strings.Contains(stdout.String(), "truncated") {
		t.Errorf("verify %d: exit %d %s", n, code, stdout.String())
	}
	if code := run([]string{"checkpoints", "verify", dir, "1"}, &stdout, &stderr); code != 0 {
		t.Errorf("verify 1 (good): exit %d", code)
	}
	// Resume skips the corrupt newest ones and offers the previous good version.
	stderr.Reset()
	stdout.Reset()
	if code := run(replayArgs(path, dir, "--resume"), &stdout, &stderr); code != 0 ||
		!strings.Contains(stderr.String(), fmt.Sprintf("resuming from checkpoint %d", n-2)) {
		t.Errorf("resume past corrupt files: exit %d %s", code, stderr.String())
	}
}

func TestCheckpointsShowAndListJSONFields(t *testing.T) {
	path, _ := writeHistory(t, 1)
	dir := t.TempDir()
	mustRun(t, replayArgs(path, dir)...)
	var list []map[string]any
	json.Unmarshal([]byte(mustRun(t, "checkpoints", "list", dir, "--json")), &list)
	for _, f := range []string{"version", "created", "position", "events", "state_sha256", "bytes", "raw_bytes", "reason", "pinned"} {
		if _, ok := list[0][f]; !ok {
			t.Errorf("list --json lacks %q: %v", f, list[0])
		}
	}
	mustRun(t, "checkpoints", "pin", dir, "1")
	out := mustRun(t, "checkpoints", "show", dir, "1")
	if !strings.Contains(out, "pinned        true") || !strings.Contains(out, "reason        periodic") {
		t.Errorf("show: %s", out)
	}
	var stdout, stderr bytes.Buffer
	if code := run([]string{"checkpoints", "show", dir, "99"}, &stdout, &stderr); code != 1 || !strings.Contains(stderr.String(), "not found") {
		t.Errorf("show missing: exit %d %s", code, stderr.String())
	}
}
