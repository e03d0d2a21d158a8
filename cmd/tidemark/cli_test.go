package main

import (
	"bytes"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
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
