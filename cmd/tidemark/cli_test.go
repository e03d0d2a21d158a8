package main

import (
	"bytes"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"tidemark/api/persist"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// TestCommandLineManners: help asked for goes to stdout with status 0;
// usage errors go to stderr with status 2 and name the flag at fault;
// `help CMD` is CMD's help; --version answers; numeric flags are
// range-checked; output paths are checked before any work; "serving on" is
// printed only once the port is bound. (Common practice for command-line
// tools: POSIX utility conventions for exit status, and the list.)
func TestCommandLineManners(t *testing.T) {
	history := filepath.Join(t.TempDir(), "h.ndjson")
	os.WriteFile(history, []byte("{\"features\":{\"a\":1},\"target\":1}\n"), 0o600)
	busy, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer busy.Close()
	data := t.TempDir()
	cases := []struct {
		args         []string
		code         int
		stdout       string // what stdout must hold ("" for nothing at all)
		stderr       string // what stderr must hold ("" for nothing at all)
		stdoutAbsent string
	}{
		{[]string{"replay", "--help"}, 0, "Usage: tidemark replay", "", ""},
		{[]string{"replay", "-h"}, 0, "--history", "", ""},
		{[]string{"help", "replay"}, 0, "Usage: tidemark replay", "", ""},
		{[]string{"help", "serve"}, 0, "kafka-group", "", ""},
		{[]string{"checkpoints", "--help"}, 0, "checkpoints list DIR", "", ""},
		{[]string{"help"}, 0, "Commands:", "", ""},
		{[]string{"--help"}, 0, "Commands:", "", ""},
		{[]string{}, 2, "", "Commands:", ""},
		{[]string{"--version"}, 0, "tidemark ", "", ""},
		{[]string{"replay", "--bogus"}, 2, "", "-bogus", ""},
		{[]string{"replay", "--history", history, "--learner", "mean", "--workers", "-3"}, 2, "", "--workers -3", ""},
		{[]string{"replay", "--history", history, "--learner", "mean", "--curve-every", "0"}, 2, "", "--curve-every 0", ""},
		{[]string{"replay", "--history", history, "--learner", "mean", "--curve", "/nonexistent-dir/c.csv"}, 2, "", "/nonexistent-dir does not exist", ""},
		{[]string{"replay", "--history", history, "--learner", "mean", "--plot", "/nonexistent-dir/p.svg"}, 2, "", "/nonexistent-dir does not exist", ""},
		{[]string{"serve", "--data", data, "--learner", "mean", "--min-scored", "-5"}, 2, "", "--min-scored -5", ""},
		{[]string{"serve", "--data", data, "--learner", "mean", "--checkpoint-every", "0"}, 2, "", "--checkpoint-every 0", ""},
		{[]string{"synth", "--out", filepath.Join(t.TempDir(), "s.ndjson"), "--rooms", "0"}, 2, "", "--rooms 0", ""},
		{[]string{"demo", "--days", "3", "--speed", "-1"}, 2, "", "--speed -1", ""},
		{[]string{"demo", "--days", "3", "--warmup", "-2"}, 2, "", "--warmup -2", ""},
		{[]string{"demo", "--every", "0s"}, 2, "", "--every 0s", ""},
		{[]string{"serve", "--data", data, "--learner", "mean", "--listen", busy.Addr().String()}, 1, "", "another address", "serving on"},
	}
	for _, c := range cases {
		var stdout, stderr bytes.Buffer
		code := run(c.args, &stdout, &stderr)
		ok := code == c.code
		ok = ok && (c.stdout == "" && stdout.Len() == 0 || c.stdout != "" && strings.Contains(stdout.String(), c.stdout))
		ok = ok && (c.stderr == "" && stderr.Len() == 0 || c.stderr != "" && strings.Contains(stderr.String(), c.stderr))
		if c.stdoutAbsent != "" {
			ok = code == c.code && !strings.Contains(stdout.String(), c.stdoutAbsent) && strings.Contains(stderr.String(), c.stderr)
		}
		if !ok {
			t.Errorf("%v: exit %d (want %d)\nstdout %.300q (want %q)\nstderr %.300q (want %q)", c.args, code, c.code, stdout.String(), c.stdout, stderr.String(), c.stderr)
		}
	}
}

// TestCheckpointsCommandsManners: the checkpoints commands take a data
// directory as well as its checkpoints/ directory; a missing directory is an
// error; an empty store lists as [] in JSON and says so in a table; show
// prints a skip rule's times as RFC 3339 times.
func TestCheckpointsCommandsManners(t *testing.T) {
	data := t.TempDir()
	empty := t.TempDir()
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: filepath.Join(data, "checkpoints")})
	if err != nil {
		t.Fatal(err)
	}
	eng, _ := learner.NewEngine(crashEngine(t))
	from := time.Date(2026, 3, 2, 10, 0, 0, 0, time.UTC)
	src := map[string]any{"kind": "service", "skip": map[string]any{"from_time": from.UnixNano(), "to_time": from.Add(6 * time.Hour).UnixNano(), "has_time": true}}
	if _, err := persist.Save(store, eng, checkpoint.Restore, 0, src); err != nil {
		t.Fatal(err)
	}
	store.Close()
	cases := []struct {
		args   []string
		code   int
		stdout string
		stderr string
	}{
		{[]string{"checkpoints", "list", data}, 0, "restore", ""},
		{[]string{"checkpoints", "list", data, "--json"}, 0, `"reason": "restore"`, ""},
		{[]string{"checkpoints", "show", data, "1"}, 0, `"skip":{"from_time":"2026-03-02T10:00:00Z","to_time":"2026-03-02T16:00:00Z"}`, ""},
		{[]string{"checkpoints", "list", empty, "--json"}, 0, "[]", ""},
		{[]string{"checkpoints", "list", empty}, 0, "no checkpoints", ""},
		{[]string{"checkpoints", "list", filepath.Join(empty, "nonexistent")}, 1, "", "does not exist"},
	}
	for _, c := range cases {
		var stdout, stderr bytes.Buffer
		code := run(c.args, &stdout, &stderr)
		if code != c.code || !strings.Contains(stdout.String(), c.stdout) || !strings.Contains(stderr.String(), c.stderr) {
			t.Errorf("%v: exit %d (want %d)\nstdout %.400q (want %q)\nstderr %.300q (want %q)", c.args, code, c.code, stdout.String(), c.stdout, stderr.String(), c.stderr)
		}
	}
}
