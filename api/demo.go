package api

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"os"
	"sort"
	"strings"
	"time"

	"tidemark/bench/synth"
	"tidemark/learner"
)

// DemoLearners is the demo's set: windowed k-NN, forgetting RLS, cumulative
// RLS, sliding-window RLS and the mean baseline. Windows count events per key
// (a room reports 288 readings a day).
var DemoLearners = []string{
	"knn:k=10,window=2016,name=knn-week",
	"rls:forget=0.995,name=rls-forget",
	"rls:forget=1,name=rls-cumulative",
	"sliding-rls:window=864,name=sliding-rls-3d",
	"mean:window=288,name=mean-day",
}

// DemoConfig configures RunDemo. Zero fields take the defaults.
type DemoConfig struct {
	Listen  string  // Default: DefaultListen.
	DataDir string  // Default: a new temporary directory, kept after the demo.
	Days    int     // days of the scenario. Default: 14.
	Seed    uint64  // Default: 1.
	Speed   float64 // event time per wall time; 1440 plays a day a minute. Default: 1440.
	Warmup  int     // days fed at once before pacing starts. Default: 1.
	Every   time.Duration
	Out     io.Writer // the demo's own lines. Required.
	Log     io.Writer // service log. Nil discards it.
	// Ready, when set, is called once the service answers, with its base URL.
	Ready func(base string)
}

// RunDemo runs the whole product on this machine: the service, fed the
// synthetic warehouse scenario over HTTP at an accelerated pace, with the
// demo's learners. It prints where to look and a scoreboard every Every,
// and stops cleanly, with a final checkpoint, when ctx ends or the scenario
// is played out.
func RunDemo(ctx context.Context, dc DemoConfig) error {
	if dc.Days <= 0 {
		dc.Days = 14
	}
	if dc.Speed <= 0 {
		dc.Speed = 1440
	}
	if dc.Warmup <= 0 {
		dc.Warmup = 1
	}
	if dc.Every <= 0 {
		dc.Every = 10 * time.Second
	}
	if dc.Listen == "" {
		dc.Listen = DefaultListen
	}
	if dc.DataDir == "" {
		d, err := os.MkdirTemp("", "tidemark-demo-")
		if err != nil {
			return err
		}
		dc.DataDir = d
	}
	var hist bytes.Buffer
	if _, err := synth.Write(&hist, synth.Config{Days: dc.Days, Seed: dc.Seed}); err != nil {
		return err
	}
	eng := learner.Config{Features: learner.FeatureConfig{HashBuckets: 4, TimeFeatures: true}}
	for _, s := range DemoLearners {
		sp, err := learner.ParseSpec(s)
		if err != nil {
			return err
		}
		eng.Learners = append(eng.Learners, sp)
	}
	cfg := Config{Listen: dc.Listen, DataDir: dc.DataDir, Engine: eng, CheckpointEvery: 2000, CheckpointInterval: 30 * time.Second}
	if dc.Log != nil {
		cfg.Log = newTextLogger(dc.Log)
	}
	svc, err := New(cfg)
	if err != nil {
		return err
	}
	sctx, stop := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- svc.Run(sctx) }()
	addr := svc.Addr()
	if addr == "" {
		stop()
		return <-done
	}
	base := "http://" + addr
	printDemoIntro(dc, base)
	feedErr := feedDemo(ctx, dc, base, hist.Bytes(), svc)
	stop()
	err = <-done
	fmt.Fprintf(dc.Out, "\nstopped: a shutdown checkpoint is in %s/checkpoints; run the demo again with --data %s to resume from it.\n", dc.DataDir, dc.DataDir)
	if feedErr != nil && ctx.Err() == nil {
		return errors.Join(feedErr, err)
	}
	return err
}

func printDemoIntro(dc DemoConfig, base string) {
	stuckDay := int(0.7 * float64(dc.Days))
	stuckFrom := synth.Start.Add(time.Duration(stuckDay)*24*time.Hour + 10*time.Hour)
	stuckTo := stuckFrom.Add(6 * time.Hour)
	fault := synth.Start.Add(time.Duration(dc.Days) * 12 * time.Hour)
	w := dc.Out
	fmt.Fprintf(w, "tidemark demo: %d days of a fictional cold-storage warehouse (invented data; `tidemark synth --help` gives its equations).\n", dc.Days)
	fmt.Fprintf(w, "Three rooms report compressor power (kW) every five minutes; room-b's insulation fails at %s,\n", fault.Format(time.RFC3339))
	fmt.Fprintf(w, "and the outdoor sensor is stuck from %s to %s. The first %s goes in at once, then a day\nevery %s of wall time.\n\n",
		stuckFrom.Format(time.RFC3339), stuckTo.Format(time.RFC3339), plural(dc.Warmup, "day"), (time.Duration(float64(24*time.Hour) / dc.Speed)).Round(time.Second))
	fmt.Fprintf(w, "  service     %s   (data in %s)\n", base, dc.DataDir)
	fmt.Fprintf(w, "  dashboard   %s/\n", base)
	fmt.Fprintf(w, "  learners    curl -s '%s/v1/learners?keys=false'\n", base)
	fmt.Fprintf(w, "  predict     curl -s -H 'Content-Type: application/json' -d '{\"learner\":\"rls-forget\",\"key\":\"room-b\",\"time\":\"%s\",\"features\":{\"outdoor_c\":14,\"door_min\":2,\"shift\":\"day\"}}' %s/v1/predict\n",
		synth.Start.Add(36*time.Hour).Format(time.RFC3339), base)
	fmt.Fprintf(w, "  curve       curl -s %s/v1/learners/rls-forget/curve\n", base)
	fmt.Fprintf(w, "  checkpoints curl -s %s/v1/checkpoints\n", base)
	fmt.Fprintf(w, "  restore     curl -s -H 'Content-Type: application/json' -d '{\"resume\":\"skip\",\"skip_from_time\":\"%s\",\"skip_to_time\":\"%s\"}' %s/v1/checkpoints/VERSION/restore\n",
		stuckFrom.Format(time.RFC3339), stuckTo.Format(time.RFC3339), base)
	fmt.Fprintf(w, "              (VERSION: a checkpoint taken before %s, from the list above)\n", stuckFrom.Format(time.RFC3339))
	fmt.Fprintf(w, "  metrics     curl -s %s/metrics | grep ^tidemark_\n\n", base)
	fmt.Fprintf(w, "Predictions steer decisions: check a learner's recent error before acting on it. Ctrl-C stops with a checkpoint.\n\n")
}

// feedDemo posts the scenario: the warm-up days at once, then each
// five-minute tick of event time at the demo's pace.
func feedDemo(ctx context.Context, dc DemoConfig, base string, hist []byte, svc *Service) error {
	type tick struct {
		at    time.Time
		lines [][]byte
	}
	var ticks []tick
	var ev learner.Event
	// A demo started again on its data directory resumes: the events its
	// journal already holds are not posted twice.
	already := svc.journal.Durable()
	if already > 0 {
		fmt.Fprintf(dc.Out, "resuming: the journal holds %d events of the scenario already; going on from there.\n\n", already)
	}
	for _, l := range bytes.Split(bytes.TrimSpace(hist), []byte("\n")) {
		if already > 0 {
			if learner.DecodeEvent(l, &ev) == nil {
				already--
			}
			continue
		}
		if learner.DecodeRow(l, &ev) == nil && ev.HasTime {
			if t := time.Unix(0, ev.Time).UTC(); len(ticks) == 0 || t.After(ticks[len(ticks)-1].at) {
				ticks = append(ticks, tick{at: t})
			}
		}
		if len(ticks) == 0 {
			ticks = append(ticks, tick{at: synth.Start})
		}
		ticks[len(ticks)-1].lines = append(ticks[len(ticks)-1].lines, l) // a malformed line rides with its tick
	}
	client := &http.Client{Timeout: 30 * time.Second}
	post := func(lines [][]byte) error {
		if len(lines) == 0 {
			return nil
		}
		resp, err := client.Post(base+"/v1/events", "application/x-ndjson", bytes.NewReader(bytes.Join(lines, []byte("\n"))))
		if err != nil {
			return err
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		if resp.StatusCode != http.StatusOK && resp.StatusCode != http.StatusBadRequest { // 400: only malformed lines
			return fmt.Errorf("POST /v1/events: %s: %s", resp.Status, b)
		}
		return nil
	}
	warmEnd := synth.Start.Add(time.Duration(dc.Warmup) * 24 * time.Hour)
	var warm [][]byte
	i := 0
	for ; i < len(ticks) && ticks[i].at.Before(warmEnd); i++ {
		warm = append(warm, ticks[i].lines...)
	}
	for j := 0; j < len(warm); j += 2000 {
		if err := post(warm[j:min(j+2000, len(warm))]); err != nil {
			return err
		}
	}
	for j := 0; j < 300 && !svc.ready.Load(); j++ {
		time.Sleep(10 * time.Millisecond)
	}
	time.Sleep(2 * DefaultPublishEvery)
	if i > 0 {
		scoreboard(dc.Out, svc, ticks[i-1].at, dc.Days)
	}
	if dc.Ready != nil {
		dc.Ready(base)
	}
	step := time.Duration(float64(5*time.Minute) / dc.Speed)
	board := time.NewTicker(dc.Every)
	defer board.Stop()
	next := time.Now()
	for ; i < len(ticks); i++ {
		if err := post(ticks[i].lines); err != nil {
			return err
		}
		next = next.Add(step)
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-board.C:
			scoreboard(dc.Out, svc, ticks[i].at, dc.Days)
		case <-time.After(time.Until(next)):
		}
	}
	time.Sleep(2 * DefaultPublishEvery)
	scoreboard(dc.Out, svc, ticks[len(ticks)-1].at, dc.Days)
	fmt.Fprintf(dc.Out, "the scenario is played out.\n")
	return nil
}

// scoreboard prints one line per learner: recent error, skill, drift.
func scoreboard(w io.Writer, svc *Service, at time.Time, days int) {
	snap := svc.snap.Load()
	if snap == nil {
		return
	}
	r := snap.report
	day := at.Sub(synth.Start).Hours() / 24
	fmt.Fprintf(w, "%s (day %.1f of %d): %d events, %d rejected, checkpoint %d\n", at.Format("Jan 2 15:04"), day, days, r.Events, r.Rejected, snap.ckVersion)
	ls := append([]learner.LearnerReport(nil), r.Learners...)
	sort.SliceStable(ls, func(i, j int) bool { return val(ls[i].Recent.RMSE) < val(ls[j].Recent.RMSE) })
	for _, l := range ls {
		fmt.Fprintf(w, "    %-16s recent rmse %6s kW   skill %6s   drift %-7s alarms %d\n", l.Name, f3(l.Recent.RMSE), f3(l.Skill), l.Drift.State, l.Drift.Alarms)
	}
}

func val(p *float64) float64 {
	if p == nil {
		return 1e300
	}
	return *p
}

func f3(p *float64) string {
	if p == nil {
		return "–"
	}
	return strings.TrimSpace(fmt.Sprintf("%.3f", *p))
}

func plural(n int, word string) string {
	if n == 1 {
		return word
	}
	return fmt.Sprintf("%d %ss", n, word)
}
