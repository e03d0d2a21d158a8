package main

import (
	"context"
	"io"
	"os"
	"os/signal"
	"syscall"
	"time"

	"tidemark/api"
)

func runDemo(args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("demo", "demo [--listen ADDR] [--data DIR] [--days N] [--speed X] [--duration D]", stderr)
	listen := fs.String("listen", api.DefaultListen, "HTTP listen address of the demo's service")
	data := fs.String("data", "", "data directory (default: a new temporary one, kept afterwards)")
	days := fs.Int("days", 14, "days of the demo scenario")
	seed := fs.Uint64("seed", 1, "random seed of the scenario")
	speed := fs.Float64("speed", 1440, "event time per wall time (1440: a day a minute)")
	warmup := fs.Int("warmup", 1, "days fed at once before pacing starts")
	every := fs.Duration("every", 10*time.Second, "print the scoreboard this often")
	duration := fs.Duration("duration", 0, "stop after this long (0: when the scenario is played out or on Ctrl-C)")
	verbose := fs.Bool("verbose", false, "print the service's log on stderr")
	if _, err := parse(fs, args); err != nil {
		return err
	}
	if *days < 1 || *days > 366 || *warmup >= *days || *speed <= 0 {
		return usagef("want --days from 2 to 366, --warmup below --days, and a positive --speed")
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if *duration > 0 {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, *duration)
		defer cancel()
	}
	dc := api.DemoConfig{Listen: *listen, DataDir: *data, Days: *days, Seed: *seed, Speed: *speed, Warmup: *warmup, Every: *every, Out: stdout}
	if *verbose {
		dc.Log = stderr
	}
	return api.RunDemo(ctx, dc)
}
