package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"path/filepath"
	"strings"

	"tidemark/api/intake"
	"tidemark/api/replay"
	"tidemark/api/replay/chart"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// engineFlags are the flags that shape the engine, shared by replay and demo.
type engineFlags struct {
	learners      multi
	timeFeatures  bool
	hashBuckets   int
	maxKeys       int
	memoryBudget  byteSize
	numeric       string
	categorical   string
	level         float64
	conformalStep float64
	drift         string
	leader        bool
}

func (f *engineFlags) register(fs *flag.FlagSet) {
	fs.Var(&f.learners, "learner", "learner spec `KIND[:PARAM=VALUE,...]`, repeatable (knn, rls, sliding-rls, mean);\na value LO..HI or A|B|C sweeps it, e.g. knn:k=1..30 or 'rls:forget=0.99|0.995|1' (quote the |)")
	fs.BoolVar(&f.timeFeatures, "time-features", false, "add hour of day and day of week (sin/cos) from the event time")
	fs.IntVar(&f.hashBuckets, "hash-buckets", learner.DefaultHashBuckets, "buckets for hashed categorical features")
	fs.StringVar(&f.numeric, "numeric", "", "fix the schema's numeric features, comma-separated (default: from the first valid event)")
	fs.StringVar(&f.categorical, "categorical", "", "fix the schema's categorical (string) features, comma-separated")
	fs.IntVar(&f.maxKeys, "max-keys", learner.DefaultMaxKeys, "cap on distinct keys; events for new keys past it are rejected")
	f.memoryBudget = byteSize(defaultMemoryBudget())
	fs.BoolVar(&f.leader, "leader", false, "keep a per-key leader (the learner of lowest recent RMSE, switched with 5 % hysteresis), scored like a learner;\npredict answers for it with \"learner\":\"leader\"")
	fs.StringVar(&f.drift, "drift", learner.DriftPageHinkley, "drift detector on each learner's error per key: page-hinkley or adwin (Bifet & Gavaldà 2007; costlier)")
	fs.Float64Var(&f.level, "interval-level", learner.DefaultLevel, "nominal coverage of the prediction intervals (both methods), in (0, 1)")
	fs.Float64Var(&f.conformalStep, "conformal-step", learner.DefaultConformalStep, "γ of the conformal intervals: their quantile's step, in recent RMSEs")
	fs.Var(&f.memoryBudget, "memory-budget", "most the model state may hold (e.g. 8GiB, 512MiB; 0 for none); events of new keys past it are\nrejected, known keys go on learning; the default is half of this machine's memory")
}

func (f *engineFlags) config() (learner.Config, error) {
	cfg := learner.Config{
		Features: learner.FeatureConfig{HashBuckets: f.hashBuckets, TimeFeatures: f.timeFeatures,
			Numeric: splitList(f.numeric), Categorical: splitList(f.categorical)},
		MaxKeys: f.maxKeys, MemoryBudget: int64(f.memoryBudget),
		Score:  learner.ScoreConfig{Level: f.level, ConformalStep: f.conformalStep},
		Drift:  learner.DriftConfig{Method: f.drift},
		Leader: learner.LeaderConfig{On: f.leader},
	}
	if !(f.level > 0 && f.level < 1) {
		return cfg, fmt.Errorf("--interval-level %g: want a coverage between 0 and 1, e.g. 0.9", f.level)
	}
	if !(f.conformalStep > 0 && f.conformalStep <= 1) {
		return cfg, fmt.Errorf("--conformal-step %g: want a step in (0, 1], e.g. %g", f.conformalStep, learner.DefaultConformalStep)
	}
	var errs []error
	for _, text := range f.learners {
		specs, err := learner.ExpandSpec(text)
		if err != nil {
			errs = append(errs, err)
			continue
		}
		cfg.Learners = append(cfg.Learners, specs...)
	}
	if len(cfg.Learners) > learner.MaxSweep {
		errs = append(errs, fmt.Errorf("%d learners in all, more than the limit of %d", len(cfg.Learners), learner.MaxSweep))
	}
	if f.maxKeys < 1 {
		errs = append(errs, fmt.Errorf("--max-keys %d: want at least 1", f.maxKeys))
	}
	if f.hashBuckets < 1 {
		errs = append(errs, fmt.Errorf("--hash-buckets %d: want at least 1", f.hashBuckets))
	}
	if err := errors.Join(errs...); err != nil {
		return cfg, err
	}
	return cfg, cfg.Validate()
}

func splitList(s string) []string {
	var out []string
	for _, v := range strings.Split(s, ",") {
		if v = strings.TrimSpace(v); v != "" {
			out = append(out, v)
		}
	}
	return out
}

func runReplay(args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("replay", "replay --history FILE --learner SPEC... [--json] [--strict] [--per-key]\n        [--checkpoints DIR [--every N] [--resume]]", stderr)
	var ef engineFlags
	ef.register(fs)
	history := fs.String("history", "", "history `FILE`: NDJSON events, CSV rows (FILE.csv; plain, .gz or .zst alike) or Parquet rows (FILE.parquet)")
	format := fs.String("format", "", "the history's format: ndjson, csv or parquet (default: from its name)")
	var ff fieldFlags
	ff.register(fs)
	asJSON := fs.Bool("json", false, "print the report as one JSON object")
	strict := fs.Bool("strict", false, "stop at the first rejected line (exit status 2)")
	perKey := fs.Bool("per-key", false, "include each key's metrics (JSON) or a table per key")
	ckDir := fs.String("checkpoints", "", "write checkpoints to `DIR` (one at the end, and every --every lines)")
	every := fs.Int64("every", 0, "with --checkpoints, also write a checkpoint every `N` lines")
	resume := fs.Bool("resume", false, "with --checkpoints, restore the newest good checkpoint and continue after the line it covers")
	curvePath := fs.String("curve", "", "write each learner's recent mae and rmse per bucket of events to `FILE.csv`")
	curveEvery := fs.Int64("curve-every", chart.DefaultEvery, "events per --curve row")
	plotPath := fs.String("plot", "", "draw error over time and prediction against target to `FILE.svg` or FILE.png")
	plotKey := fs.String("plot-key", "", "key whose predictions the plot shows (default: the first key seen)")
	units := fs.String("units", "", "the target's units, for the plot's axes (e.g. kW)")
	quiet := fs.Bool("quiet", false, "no progress bar")
	sequential := fs.Bool("sequential", false, "decode on the learning goroutine instead of a second one (same results; for measuring)")
	workers := fs.Int("workers", 0, "spread the learners over this many goroutines (0: one per CPU; same results;\nnot with --checkpoints, --curve, --plot or --leader, which use one)")
	labelDelay := fs.Duration("label-delay", 0, "replay as a service whose labels come this much event time after the question (e.g. 2h):\nevery learner answers each event at its time and is scored on those answers when the label\narrives (\"served\" in the report), beside its prequential score; not with --checkpoints")
	pos, err := parse(fs, args)
	if err != nil {
		return err
	}
	if len(pos) > 0 {
		return usagef("unexpected argument %q (the history is given with --history)", pos[0])
	}
	if *history == "" {
		return usagef("--history FILE is required")
	}
	if len(ef.learners) == 0 {
		return usagef("give at least one --learner SPEC, e.g. --learner knn:k=10,window=2000 --learner rls:forget=0.995 --learner mean")
	}
	if (*every != 0 || *resume) && *ckDir == "" {
		return usagef("--every and --resume need --checkpoints DIR")
	}
	if *plotPath != "" && !strings.HasSuffix(*plotPath, ".svg") && !strings.HasSuffix(*plotPath, ".png") {
		return usagef("--plot %s: want a file ending in .svg or .png", *plotPath)
	}
	if *every < 0 {
		return usagef("--every %d: want a positive number of lines", *every)
	}
	if *workers < 0 {
		return usagef("--workers %d: want 0 (one per CPU) or a positive number of goroutines", *workers)
	}
	if *labelDelay < 0 {
		return usagef("--label-delay %v: want a positive duration of event time, e.g. 2h", *labelDelay)
	}
	if *labelDelay > 0 && *ckDir != "" {
		return usagef("--label-delay cannot be combined with --checkpoints")
	}
	if *curveEvery < 1 {
		return usagef("--curve-every %d: want a positive number of events per row", *curveEvery)
	}
	// Output files are checked before the work, not after it.
	for _, out := range []struct{ flag, path string }{{"--curve", *curvePath}, {"--plot", *plotPath}} {
		if out.path == "" {
			continue
		}
		dir := filepath.Dir(out.path)
		if st, err := os.Stat(dir); err != nil || !st.IsDir() {
			return usagef("%s %s: the directory %s does not exist; create it first", out.flag, out.path, dir)
		}
	}
	cfg, err := ef.config()
	if err != nil {
		return usageError{err}
	}
	var store *checkpoint.Store
	if *ckDir != "" {
		if store, err = checkpoint.OpenStore(checkpoint.StoreConfig{Dir: *ckDir}); err != nil {
			return err
		}
		defer store.Close()
	}
	if *format == "" {
		*format = intake.FormatOf(*history)
	}
	set := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })
	fields, err := ff.fields(set, fieldsFile{}, splitList(ef.categorical), splitList(ef.numeric))
	if err != nil {
		return usageError{err}
	}
	h, err := intake.OpenHistoryAs(*history, *format, fields)
	if err != nil {
		return usageError{err}
	}
	defer h.Close()
	eng, err := learner.NewEngine(cfg)
	if err != nil {
		return usageError{err}
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	rc := replay.ReplayConfig{Strict: *strict, Log: plainWriter{stderr}, Checkpoints: store, Every: *every, Resume: *resume, Sequential: *sequential, LabelDelay: *labelDelay}
	var rec *chart.Recorder
	if *curvePath != "" || *plotPath != "" {
		rec = chart.NewRecorder(eng, *curveEvery, *plotKey)
		rc.Observe = rec.Observe
	}
	bar := newProgress(stderr, h.Size(), *quiet)
	if bar != nil {
		rc.Progress = bar.update
		rc.Log = bar.writer()
	}
	parallel := *workers != 1 && store == nil && rec == nil && !*sequential && len(cfg.Learners) > 1 && !cfg.Leader.On && // the leader compares every learner of a key
		*labelDelay == 0 // the answers served are scored on one engine
	var report learner.Report
	if parallel {
		report, err = replay.ReplayParallel(ctx, h, cfg, *workers, rc)
	} else {
		err = replay.Replay(ctx, h, eng, rc)
	}
	if bar != nil {
		bar.finish()
	}
	if errors.Is(err, replay.ErrStrict) || errors.Is(err, replay.ErrResume) {
		return usageError{err}
	}
	if err != nil {
		return err
	}
	if rec != nil {
		rec.Finish(eng)
		if *curvePath != "" {
			if err := writeFile(*curvePath, rec.WriteCSV); err != nil {
				return err
			}
		}
		if *plotPath != "" {
			if err := rec.Plot(*plotPath, *units); err != nil {
				return err
			}
		}
	}
	if !parallel {
		report = eng.Report(true)
	}
	if !*perKey {
		for i := range report.Learners {
			report.Learners[i].Keys = nil
		}
	}
	return writeReport(stdout, report, *asJSON)
}

func writeFile(path string, write func(io.Writer) error) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	if err := write(f); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

func writeReport(w io.Writer, r learner.Report, asJSON bool) error {
	if asJSON {
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		return enc.Encode(r)
	}
	return replay.WriteTable(w, r)
}
