package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"os"
	"os/signal"
	"sort"
	"strings"
	"syscall"
	"time"

	"tidemark/api"
	"tidemark/bench/synth"
	"tidemark/checkpoint"
	"tidemark/learner"
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
	var bad []string
	if *days < 2 || *days > 366 {
		bad = append(bad, fmt.Sprintf("--days %d: want 2 to 366", *days))
	}
	if *warmup < 0 || *warmup >= *days {
		bad = append(bad, fmt.Sprintf("--warmup %d: want 0 up to --days − 1 (%d)", *warmup, *days-1))
	}
	if !(*speed > 0) {
		bad = append(bad, fmt.Sprintf("--speed %v: want a positive factor (1440: a day a minute)", *speed))
	}
	if *every <= 0 {
		bad = append(bad, fmt.Sprintf("--every %v: want a positive duration", *every))
	}
	if *duration < 0 {
		bad = append(bad, fmt.Sprintf("--duration %v: want 0 (until the end) or a positive duration", *duration))
	}
	if len(bad) > 0 {
		return usagef("%s", strings.Join(bad, "; "))
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if *duration > 0 {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, *duration)
		defer cancel()
	}
	dc := demoConfig{Listen: *listen, DataDir: *data, Days: *days, Seed: *seed, Speed: *speed, Warmup: *warmup, Every: *every, Out: stdout}
	if *verbose {
		dc.Log = stderr
	}
	return demo(ctx, dc)
}

// demoConfig configures demo. Zero fields take the defaults.
type demoConfig struct {
	Listen  string  // Default: api.DefaultListen.
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

// demo runs the whole product on this machine: the service, with the demo's
// learners, and a client that feeds it the synthetic warehouse scenario over
// HTTP at an accelerated pace. The client drives the service only through
// its HTTP API (/readyz, /v1/events, /v1/learners, /v1/checkpoints); it
// prints where to look and a scoreboard every Every, and stops the service
// cleanly, with a final checkpoint, when ctx ends or the scenario is played out.
func demo(ctx context.Context, dc demoConfig) error {
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
		dc.Listen = api.DefaultListen
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
	for _, s := range synth.Learners {
		sp, err := learner.ParseSpec(s)
		if err != nil {
			return err
		}
		eng.Learners = append(eng.Learners, sp)
	}
	cfg := api.Config{Listen: dc.Listen, DataDir: dc.DataDir, Engine: eng, CheckpointEvery: 2000, CheckpointInterval: 30 * time.Second, Units: "kW"}
	if dc.Log != nil {
		cfg.Log = slog.New(slog.NewTextHandler(dc.Log, nil))
	}
	svc, err := api.New(cfg)
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
	feedErr := feedDemo(ctx, dc, &client{base: base, http: &http.Client{Timeout: 30 * time.Second}}, hist.Bytes())
	stop()
	err = <-done
	fmt.Fprintf(dc.Out, "\nstopped: a shutdown checkpoint is in %s/checkpoints; run the demo again with --data %s to resume from it.\n", dc.DataDir, dc.DataDir)
	if feedErr != nil && ctx.Err() == nil {
		return errors.Join(feedErr, err)
	}
	return err
}

func printDemoIntro(dc demoConfig, base string) {
	stuckDay := int(0.7 * float64(dc.Days))
	stuckFrom := synth.Start.Add(time.Duration(stuckDay)*24*time.Hour + 10*time.Hour)
	stuckTo := stuckFrom.Add(6 * time.Hour)
	fault := synth.Start.Add(time.Duration(dc.Days) * 12 * time.Hour)
	w := dc.Out
	fmt.Fprintf(w, "tidemark demo: %d days of a fictional cold-storage warehouse (invented data; `tidemark synth --help` gives its equations).\n", dc.Days)
	fmt.Fprintf(w, "Three rooms report compressor power (kW) every five minutes; room-b's insulation fails at %s,\n", fault.Format(time.RFC3339))
	fmt.Fprintf(w, "and the outdoor sensor is stuck from %s to %s. The first %s goes in at once, then a day\nevery %s of wall time. "+
		"A dispatcher asks rls-forget for each reading two hours ahead; each reading names the answer it\nlabels, so the service scores the answers it gave (\"served\") beside the prequential score.\n\n",
		stuckFrom.Format(time.RFC3339), stuckTo.Format(time.RFC3339), plural(dc.Warmup, "day"), (time.Duration(float64(24*time.Hour) / dc.Speed)).Round(time.Second))
	fmt.Fprintf(w, "  service     %s   (data in %s)\n", base, dc.DataDir)
	fmt.Fprintf(w, "  page        %s/   (open it: the learners race, alarms, checkpoints; restore from there)\n", base)
	fmt.Fprintf(w, "  learners    curl -s '%s/v1/learners?keys=false'\n", base)
	fmt.Fprintf(w, "  predict     curl -s -H 'Content-Type: application/json' -d '{\"learner\":\"rls-forget\",\"key\":\"room-b\",\"time\":\"%s\",\"features\":{\"outdoor_c\":14,\"door_min\":2,\"shift\":\"day\"}}' '%s/v1/predict'\n",
		synth.Start.Add(36*time.Hour).Format(time.RFC3339), base)
	fmt.Fprintf(w, "  curve       curl -s '%s/v1/learners/rls-forget/curve'\n", base)
	fmt.Fprintf(w, "  checkpoints curl -s '%s/v1/checkpoints'\n", base)
	fmt.Fprintf(w, "  restore     curl -s -H 'Content-Type: application/json' -d '{\"resume\":\"skip\",\"skip_from_time\":\"%s\",\"skip_to_time\":\"%s\"}' '%s/v1/checkpoints/VERSION/restore'\n",
		stuckFrom.Format(time.RFC3339), stuckTo.Format(time.RFC3339), base)
	fmt.Fprintf(w, "              (VERSION: a checkpoint whose events end before %s, from the list above)\n", stuckFrom.Format(time.RFC3339))
	fmt.Fprintf(w, "  metrics     curl -s '%s/metrics' | grep ^tidemark_\n\n", base)
	fmt.Fprintf(w, "Predictions steer decisions: check a learner's recent error before acting on it. Ctrl-C stops with a checkpoint.\n\n")
}

// client is the demo's HTTP client of the service.
type client struct {
	base string
	http *http.Client
}

// getJSON fetches path into v.
func (c *client) getJSON(path string, v any) error {
	resp, err := c.http.Get(c.base + path)
	if err != nil {
		return err
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		b, _ := io.ReadAll(resp.Body)
		return fmt.Errorf("GET %s: %s: %s", path, resp.Status, b)
	}
	return json.NewDecoder(resp.Body).Decode(v)
}

// post sends events as NDJSON.
func (c *client) post(lines [][]byte) error {
	if len(lines) == 0 {
		return nil
	}
	resp, err := c.http.Post(c.base+"/v1/events", "application/x-ndjson", bytes.NewReader(bytes.Join(lines, []byte("\n"))))
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

// ready waits (up to a few seconds) until /readyz answers 200.
func (c *client) ready() bool {
	for j := 0; j < 300; j++ {
		resp, err := c.http.Get(c.base + "/readyz")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return true
			}
		}
		time.Sleep(10 * time.Millisecond)
	}
	return false
}

// covered returns the journal offset the service's state covers (the
// demo's events it holds already).
func (c *client) covered() int64 {
	var r learner.Report
	if c.getJSON("/v1/learners?keys=false", &r) != nil {
		return 0
	}
	for _, p := range r.Positions {
		if p.Partition == 0 {
			return p.Offset
		}
	}
	return 0
}

// feedDemo posts the scenario: the warm-up days at once, then each
// five-minute tick of event time at the demo's pace.
func feedDemo(ctx context.Context, dc demoConfig, c *client, hist []byte) error {
	type tick struct {
		at    time.Time
		lines [][]byte
	}
	var ticks []tick
	var ev learner.Event
	// A demo started again on its data directory resumes: once the service
	// has caught up with its journal, the events its state covers are not
	// posted twice.
	c.ready()
	already := c.covered()
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
	warmEnd := synth.Start.Add(time.Duration(dc.Warmup) * 24 * time.Hour)
	var warm [][]byte
	i := 0
	for ; i < len(ticks) && ticks[i].at.Before(warmEnd); i++ {
		warm = append(warm, ticks[i].lines...)
	}
	for j := 0; j < len(warm); j += 2000 {
		if err := c.post(warm[j:min(j+2000, len(warm))]); err != nil {
			return err
		}
	}
	c.ready()
	time.Sleep(2 * api.DefaultPublishEvery)
	if i > 0 {
		scoreboard(dc.Out, c, ticks[i-1].at, dc.Days)
	}
	if dc.Ready != nil {
		dc.Ready(c.base)
	}
	step := time.Duration(float64(5*time.Minute) / dc.Speed)
	board := time.NewTicker(dc.Every)
	defer board.Stop()
	next := time.Now()
	// The dispatcher asks for each reading two hours (24 ticks) ahead, with
	// the weather forecast for then; the reading, when it comes, names the
	// answer it labels, so that the service scores what it told the
	// dispatcher (served scoring) beside its prequential score.
	asked := map[int][]string{}
	for ; i < len(ticks); i++ {
		if j := i + demoAhead; j < len(ticks) {
			asked[j] = c.askAhead(ticks[j].lines)
		}
		lines := ticks[i].lines
		if ids := asked[i]; ids != nil {
			lines = withAnswers(lines, ids)
			delete(asked, i)
		}
		if err := c.post(lines); err != nil {
			return err
		}
		next = next.Add(step)
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-board.C:
			scoreboard(dc.Out, c, ticks[i].at, dc.Days)
		case <-time.After(time.Until(next)):
		}
	}
	time.Sleep(2 * api.DefaultPublishEvery)
	scoreboard(dc.Out, c, ticks[len(ticks)-1].at, dc.Days)
	fmt.Fprintf(dc.Out, "the scenario is played out.\n")
	return nil
}

// demoAhead is how many five-minute ticks ahead the demo's dispatcher asks,
// and demoAsks the learner it asks.
const (
	demoAhead = 24
	demoAsks  = "rls-forget"
)

// askAhead asks the service for the readings of lines (one request, a row
// each) and returns each line's answer_id ("" for a line not asked: one that
// does not decode). Nothing is asked while the service cannot answer yet.
func (c *client) askAhead(lines [][]byte) []string {
	var rows []json.RawMessage
	var at []int
	var ev learner.Event
	for k, l := range lines {
		if learner.DecodeEvent(l, &ev) == nil {
			rows = append(rows, l)
			at = append(at, k)
		}
	}
	if len(rows) == 0 {
		return nil
	}
	body, _ := json.Marshal(map[string]any{"learner": demoAsks, "rows": rows})
	resp, err := c.http.Post(c.base+"/v1/predict", "application/json", bytes.NewReader(body))
	if err != nil {
		return nil
	}
	defer resp.Body.Close()
	var out api.PredictResponse
	if resp.StatusCode != http.StatusOK || json.NewDecoder(resp.Body).Decode(&out) != nil || len(out.Predictions) != len(rows) {
		return nil // not ready for every room yet
	}
	ids := make([]string, len(lines))
	for n, k := range at {
		ids[k] = out.Predictions[n].AnswerID
	}
	return ids
}

// withAnswers returns lines with each one's answer_id added, where it has one.
func withAnswers(lines [][]byte, ids []string) [][]byte {
	out := make([][]byte, len(lines))
	for k, l := range lines {
		out[k] = l
		if k < len(ids) && ids[k] != "" && bytes.HasPrefix(l, []byte("{")) {
			out[k] = fmt.Appendf(nil, `{"answer_id":%q,%s`, ids[k], l[1:])
		}
	}
	return out
}

// scoreboard prints one line per learner: recent error, skill, drift, from
// GET /v1/learners and the newest of GET /v1/checkpoints.
func scoreboard(w io.Writer, c *client, at time.Time, days int) {
	var r learner.Report
	if c.getJSON("/v1/learners?keys=false", &r) != nil {
		return
	}
	var cks []checkpoint.Info
	var ck uint64
	if c.getJSON("/v1/checkpoints", &cks) == nil && len(cks) > 0 {
		ck = cks[len(cks)-1].Version
	}
	day := at.Sub(synth.Start).Hours() / 24
	fmt.Fprintf(w, "%s (day %.1f of %d): %d events, %d rejected, checkpoint %d\n", at.Format("Jan 2 15:04"), day, days, r.Events, r.Rejected, ck)
	ls := append([]learner.LearnerReport(nil), r.Learners...)
	sort.SliceStable(ls, func(i, j int) bool { return val(ls[i].Recent.RMSE) < val(ls[j].Recent.RMSE) })
	for _, l := range ls {
		fmt.Fprintf(w, "    %-16s recent rmse %6s kW   skill %6s   drift %-7s alarms %d\n", l.Name, f3(l.Recent.RMSE), f3(l.Skill), l.Drift.State, l.Drift.Alarms)
	}
	if r.Served == nil {
		return
	}
	for _, m := range r.Served.Learners {
		if m.Labelled > 0 {
			fmt.Fprintf(w, "    answers given 2 h ahead by %s: served rmse %s kW over %d labelled (%d waiting)\n", m.Name, f3(m.RMSE), m.Labelled, r.Served.Pending)
		}
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
