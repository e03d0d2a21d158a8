// Command tidemark learns regression models online from a stream of labelled
// events, scores them test-then-train, and compares learners on history.
//
// Usage: tidemark COMMAND [flags]; tidemark help lists the commands.
package main

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"runtime/debug"
	"strings"

	"tidemark/api"
)

// Exit statuses (DESIGN.md): 0 ok, 1 failure, 2 bad usage or input.
const (
	exitOK    = 0
	exitFail  = 1
	exitUsage = 2
)

// usageError marks an error that should exit with status 2.
type usageError struct{ err error }

func (u usageError) Error() string { return u.err.Error() }
func (u usageError) Unwrap() error { return u.err }

func usagef(format string, args ...any) error { return usageError{fmt.Errorf(format, args...)} }

type command struct {
	name, summary string
	run           func(args []string, stdout, stderr io.Writer) error
}

func commands() []command {
	return []command{
		{"serve", "run the service: learn from the journal (HTTP) or Kafka, answer predictions", runServe},
		{"replay", "prequential comparison of learners on a recorded history file", runReplay},
		{"checkpoints", "list, show, verify, pin or unpin the checkpoints in a directory", runCheckpoints},
		{"synth", "write the demo scenario's history (a cold-storage warehouse)", runSynth},
		{"demo", "the whole service on this machine, fed the demo scenario at a day a minute; no setup", runDemo},
	}
}

func main() {
	os.Exit(run(os.Args[1:], os.Stdout, os.Stderr))
}

func run(args []string, stdout, stderr io.Writer) int {
	switch {
	case len(args) == 0:
		printUsage(stderr)
		return exitUsage
	case args[0] == "-h" || args[0] == "--help" || (args[0] == "help" && len(args) == 1):
		printUsage(stdout)
		return exitOK
	case args[0] == "--version" || args[0] == "version":
		fmt.Fprintln(stdout, "tidemark", version())
		return exitOK
	case args[0] == "help":
		args = []string{args[1], "--help"} // help CMD is CMD --help
	}
	for _, c := range commands() {
		if c.name == args[0] {
			out := stderr
			if asksHelp(args[1:]) {
				out = stdout // help asked for is the answer, not a complaint
			}
			err := c.run(args[1:], stdout, out)
			switch {
			case err == nil:
				return exitOK
			case errors.Is(err, flag.ErrHelp):
				return exitOK
			}
			fmt.Fprintf(stderr, "tidemark %s: %s\n", c.name, api.Plain(err.Error()))
			var u usageError
			if errors.As(err, &u) {
				return exitUsage
			}
			return exitFail
		}
	}
	fmt.Fprintf(stderr, "tidemark: unknown command %q\n\n", args[0])
	printUsage(stderr)
	return exitUsage
}

// asksHelp reports whether args hold a help flag before any "--".
func asksHelp(args []string) bool {
	for _, a := range args {
		switch a {
		case "--":
			return false
		case "-h", "-help", "--help", "--h":
			return true
		}
	}
	return false
}

// version is the module version the binary was built from, or its VCS
// revision when built from a checkout.
func version() string {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "(unknown)"
	}
	v := bi.Main.Version
	var rev, modified string
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.modified":
			if s.Value == "true" {
				modified = ", modified"
			}
		}
	}
	if rev != "" {
		if len(rev) > 12 {
			rev = rev[:12]
		}
		v += " (" + rev + modified + ")"
	}
	return v + " " + bi.GoVersion
}

func printUsage(w io.Writer) {
	fmt.Fprintln(w, "tidemark learns regression models online from labelled events and scores them test-then-train.")
	fmt.Fprintln(w, "\nUsage: tidemark COMMAND [flags]   (tidemark help COMMAND lists a command's flags; tidemark --version)\n\nCommands:")
	for _, c := range commands() {
		fmt.Fprintf(w, "  %-12s %s\n", c.name, c.summary)
	}
}

// parse parses flags that may come before or after positional arguments and
// returns the positionals. A flag error is a usage error.
func parse(fs *flag.FlagSet, args []string) ([]string, error) {
	out := fs.Output()
	fs.SetOutput(io.Discard) // an error is returned and printed once, by run
	defer fs.SetOutput(out)
	var pos []string
	for {
		if err := fs.Parse(args); err != nil {
			if errors.Is(err, flag.ErrHelp) {
				fs.SetOutput(out)
				fs.Usage()
				return nil, err
			}
			return nil, usagef("%v (tidemark help %s lists the flags)", err, fs.Name())
		}
		args = fs.Args()
		if len(args) == 0 {
			return pos, nil
		}
		if args[0] == "--" {
			return append(pos, args[1:]...), nil
		}
		pos = append(pos, args[0])
		args = args[1:]
	}
}

// multi is a repeatable string flag.
type multi []string

func (m *multi) String() string     { return strings.Join(*m, " ") }
func (m *multi) Set(s string) error { *m = append(*m, s); return nil }

func newFlagSet(name, usage string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintf(fs.Output(), "Usage: tidemark %s\n\nFlags:\n", usage)
		fs.PrintDefaults()
	}
	return fs
}

// plainWriter writes each message without the package prefixes of the
// errors in it (api.Plain): what a person reads on stderr.
type plainWriter struct{ w io.Writer }

func (p plainWriter) Write(b []byte) (int, error) {
	if _, err := io.WriteString(p.w, api.Plain(string(b))); err != nil {
		return 0, err
	}
	return len(b), nil
}
