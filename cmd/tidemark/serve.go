package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"strings"
	"syscall"
	"time"

	"github.com/goccy/go-yaml"

	"tidemark/api"
	"tidemark/api/intake"
	"tidemark/learner"
)

// fileConfig is the YAML configuration file of `tidemark serve --config`.
// Every key is optional; flags given on the command line override it.
type fileConfig struct {
	Listen             string     `yaml:"listen"`
	Data               string     `yaml:"data"`
	Token              string     `yaml:"token"`
	TokenFile          string     `yaml:"token_file"`
	TokenForReads      bool       `yaml:"token_for_reads"`
	AllowedHosts       []string   `yaml:"allowed_hosts"`
	AllowedOrigins     []string   `yaml:"allowed_origins"`
	InsecureOpenNet    bool       `yaml:"insecure_open_network"`
	ReadyMaxLag        int64      `yaml:"ready_max_lag"`
	Learners           []string   `yaml:"learners"`
	DefaultLearner     string     `yaml:"default_learner"`
	Units              string     `yaml:"units"`
	Interval           string     `yaml:"interval"`
	Drift              string     `yaml:"drift"`
	Leader             bool       `yaml:"leader"`
	CheckpointEvery    int64      `yaml:"checkpoint_every"`
	CheckpointInterval string     `yaml:"checkpoint_interval"`
	Retain             int        `yaml:"retain"`
	MinScored          int64      `yaml:"min_scored"`
	BodyLimit          int64      `yaml:"body_limit"`
	MaxRows            int        `yaml:"max_rows"`
	MaxKeys            int        `yaml:"max_keys"`
	MemoryBudget       string     `yaml:"memory_budget"`
	Fields             fieldsFile `yaml:"fields"`
	Answers            struct {
		Log     *bool  `yaml:"log"`
		Pending int    `yaml:"pending"`
		TTL     string `yaml:"ttl"`
	} `yaml:"answers"`
	Features struct {
		Numeric      []string `yaml:"numeric"`
		Categorical  []string `yaml:"categorical"`
		HashBuckets  int      `yaml:"hash_buckets"`
		TimeFeatures bool     `yaml:"time_features"`
	} `yaml:"features"`
	History       string `yaml:"history"`
	CheckpointDir string `yaml:"checkpoint_dir"`
	Instance      string `yaml:"instance"`
	Advertise     string `yaml:"advertise"`
	Kafka         struct {
		Brokers          []string `yaml:"brokers"`
		Topic            string   `yaml:"topic"`
		Group            string   `yaml:"group"`
		Partitioner      string   `yaml:"partitioner"`
		RebalanceTimeout string   `yaml:"rebalance_timeout"`
		ForwardTimeout   string   `yaml:"forward_timeout"`
	} `yaml:"kafka"`
}

// TokenEnv is the environment variable that holds the bearer token when
// --token is not given.
const TokenEnv = "TIDEMARK_TOKEN"

func runServe(args []string, stdout, stderr io.Writer) error {
	cfg, err := serveConfig(args, stderr)
	if err != nil {
		return err
	}
	svc, err := api.New(cfg)
	if err != nil {
		return err
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	scheme := "http"
	if cfg.TLSCert != "" {
		scheme = "https"
	}
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	// Said once the port is bound (a failure to bind is Run's error).
	if addr := svc.Addr(); addr != "" {
		fmt.Fprintf(stdout, "tidemark serving on %s://%s (learners: %s); Ctrl-C stops with a final checkpoint\n", scheme, addr, cfg.Engine.Names())
	}
	return <-done
}

// serveConfig builds the service configuration from flags and the YAML
// file, reporting every problem at once.
func serveConfig(args []string, stderr io.Writer) (api.Config, error) {
	fs := newFlagSet("serve", "serve [--config FILE] [--data DIR] [--learner SPEC]... [flags]", stderr)
	configPath := fs.String("config", "", "YAML configuration `FILE`; flags override it")
	listen := fs.String("listen", api.DefaultListen, "HTTP listen address")
	data := fs.String("data", "", "data `DIR`: journal, checkpoints, dead letters (created 0700)")
	token := fs.String("token", "", "bearer token required by changing endpoints (visible to other users in ps: prefer --token-file or $"+TokenEnv+")")
	tokenFile := fs.String("token-file", "", "read the bearer token from `FILE` (first line; keep it readable by you alone)")
	tokenForReads := fs.Bool("token-for-reads", false, "require the token on reads too (learners, curves, checkpoints, metrics, the page)")
	var allowedHosts, allowedOrigins multi
	fs.Var(&allowedHosts, "allowed-host", "host `NAME` requests may be addressed to besides IP addresses and localhost (repeatable)")
	fs.Var(&allowedOrigins, "allowed-origin", "web `ORIGIN` (https://host:port) whose pages may send changing requests (repeatable)")
	insecureOpen := fs.Bool("insecure-open-network", false, "INSECURE: listen beyond loopback without a token, so that anyone who reaches the service can change the model")
	readyMaxLag := fs.Int64("ready-max-lag", 0, "report not ready while more than `N` events wait to be applied (0: no bound)")
	every := fs.Int64("checkpoint-every", api.DefaultCheckpointEvery, "events between periodic checkpoints")
	interval := fs.Duration("checkpoint-interval", api.DefaultCheckpointInterval, "also checkpoint this long after the last one")
	units := fs.String("units", "", "the target's `UNITS` (e.g. kW), shown on the page")
	intervalMethod := fs.String("interval", api.IntervalConformal, "the intervals predict quotes: conformal (adapts to the misses it sees) or normal (± z × recent RMSE)")
	defaultLearner := fs.String("default-learner", "", "the learner `NAME` predict asks when a request names none (default: the first --learner)")
	minScored := fs.Int64("min-scored", api.DefaultMinScored, "events a learner must be scored on for a key before predict answers (-1: none)")
	history := fs.String("history", "", "learn from this history `FILE` (NDJSON, plain, .gz or .zst; position = line number) instead of the journal")
	brokers := fs.String("kafka-brokers", "", "Kafka bootstrap brokers host:port,... (learn from Kafka instead of the journal)")
	topic := fs.String("kafka-topic", "", "Kafka topic of events")
	group := fs.String("kafka-group", "tidemark", "Kafka consumer group: instances with the same group split the topic's partitions")
	partitioner := fs.String("kafka-partitioner", intake.DefaultPartitioner, "the producers' key-to-partition function, to route predicts to the instance that owns the key: murmur2 (the Java client's default), fnv1a or crc32")
	rebalance := fs.Duration("kafka-rebalance-timeout", 10*time.Second, "how long the group waits for an instance to checkpoint the partitions it gives up")
	forwardTimeout := fs.Duration("forward-timeout", api.DefaultForwardTimeout, "bound on a request forwarded to another instance of the group")
	ckDir := fs.String("checkpoint-dir", "", "checkpoint `DIR` (default DATA/checkpoints); with Kafka, one every instance of the group reaches, e.g. on a shared file system")
	instance := fs.String("instance", "", "this instance's `NAME` in its consumer group (default: its advertised address)")
	advertise := fs.String("advertise", "", "the `URL` other instances of the group reach this one at (default: from --listen, e.g. http://10.0.0.7:8080)")
	logLevel := fs.String("log-level", "info", "log level: debug, info, warn, error")
	tlsCert := fs.String("tls-cert", "", "serve HTTPS with this certificate `FILE` (PEM), with --tls-key")
	tlsKey := fs.String("tls-key", "", "the certificate's private key `FILE` (PEM)")
	answerLog := fs.Bool("answer-log", true, "give every predict answer an answer_id and log it, so that events naming it score the answer as served;\n--answer-log=false serves without ids")
	answerPending := fs.Int("answer-pending", learner.DefaultServedPending, "answers waiting for their labels at once, per partition; past it the oldest is dropped")
	answerTTL := fs.Duration("answer-ttl", learner.DefaultServedTTL, "how long an answer waits for its label, in event time; then it is dropped")
	var ef engineFlags
	ef.register(fs)
	var ff fieldFlags
	ff.register(fs)
	pos, err := parse(fs, args)
	if err != nil {
		return api.Config{}, err
	}
	if len(pos) > 0 {
		return api.Config{}, usagef("unexpected argument %q", pos[0])
	}
	set := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })
	var level slog.Level
	if err := level.UnmarshalText([]byte(*logLevel)); err != nil {
		return api.Config{}, usagef("--log-level %q: want debug, info, warn or error", *logLevel)
	}

	var fc fileConfig
	var problems []error
	if *configPath != "" {
		b, err := os.ReadFile(*configPath)
		if err != nil {
			return api.Config{}, usageError{err}
		}
		if err := yaml.UnmarshalWithOptions(b, &fc, yaml.Strict()); err != nil {
			return api.Config{}, usagef("%s: %v", *configPath, err)
		}
	}
	pick := func(name string, flagVal, fileVal string) string {
		if set[name] || fileVal == "" {
			return flagVal
		}
		return fileVal
	}
	cfg := api.Config{
		Listen:  pick("listen", *listen, fc.Listen),
		DataDir: pick("data", *data, fc.Data),
		Token:   pick("token", *token, fc.Token),
	}
	var warnings []string
	if set["token"] {
		warnings = append(warnings, "the token was given with --token, where other users of this machine can read it (ps); prefer --token-file or $"+TokenEnv)
	}
	if fc.Token != "" && !set["token"] {
		if st, err := os.Stat(*configPath); err == nil && st.Mode().Perm()&0o077 != 0 {
			warnings = append(warnings, fmt.Sprintf("the configuration file %s holds the token and is readable by others (mode %v); chmod 600 it", *configPath, st.Mode().Perm()))
		}
	}
	if tf := pick("token-file", *tokenFile, fc.TokenFile); tf != "" && cfg.Token == "" {
		b, err := os.ReadFile(tf)
		if err != nil {
			problems = append(problems, fmt.Errorf("token file: %v", err))
		} else {
			cfg.Token, _, _ = strings.Cut(strings.TrimSpace(string(b)), "\n")
			cfg.Token = strings.TrimSpace(cfg.Token)
			if cfg.Token == "" {
				problems = append(problems, fmt.Errorf("token file %s is empty", tf))
			}
			if st, err := os.Stat(tf); err == nil && st.Mode().Perm()&0o077 != 0 {
				warnings = append(warnings, fmt.Sprintf("the token file %s is readable by others (mode %v); chmod 600 it", tf, st.Mode().Perm()))
			}
		}
	}
	if cfg.Token == "" {
		cfg.Token = os.Getenv(TokenEnv)
	}
	cfg.TokenForReads = *tokenForReads || fc.TokenForReads
	cfg.AllowedHosts = append([]string(allowedHosts), fc.AllowedHosts...)
	cfg.AllowedOrigins = append([]string(allowedOrigins), fc.AllowedOrigins...)
	cfg.InsecureOpenNetwork = *insecureOpen || fc.InsecureOpenNet
	cfg.ReadyMaxLag = *readyMaxLag
	if !set["ready-max-lag"] && fc.ReadyMaxLag != 0 {
		cfg.ReadyMaxLag = fc.ReadyMaxLag
	}
	cfg.TLSCert, cfg.TLSKey = *tlsCert, *tlsKey
	cfg.CheckpointEvery = *every
	if !set["checkpoint-every"] && fc.CheckpointEvery != 0 {
		cfg.CheckpointEvery = fc.CheckpointEvery
	}
	cfg.CheckpointInterval = *interval
	if !set["checkpoint-interval"] && fc.CheckpointInterval != "" {
		d, err := time.ParseDuration(fc.CheckpointInterval)
		if err != nil {
			problems = append(problems, fmt.Errorf("checkpoint_interval %q: %v", fc.CheckpointInterval, err))
		}
		cfg.CheckpointInterval = d
	}
	cfg.MinScored = *minScored
	if !set["min-scored"] && fc.MinScored != 0 {
		cfg.MinScored = fc.MinScored
	}
	if cfg.MinScored < -1 {
		problems = append(problems, fmt.Errorf("--min-scored %d: want -1 (no minimum), 0 (the default, %d) or a positive number of events", cfg.MinScored, api.DefaultMinScored))
	}
	if cfg.CheckpointEvery < 0 || (set["checkpoint-every"] && cfg.CheckpointEvery == 0) {
		problems = append(problems, fmt.Errorf("--checkpoint-every %d: want a positive number of events", cfg.CheckpointEvery))
	}
	if cfg.CheckpointInterval <= 0 && set["checkpoint-interval"] {
		problems = append(problems, fmt.Errorf("--checkpoint-interval %v: want a positive duration", cfg.CheckpointInterval))
	}
	if cfg.ForwardTimeout <= 0 && set["forward-timeout"] {
		problems = append(problems, fmt.Errorf("--forward-timeout %v: want a positive duration", cfg.ForwardTimeout))
	}
	cfg.Retain, cfg.BodyLimit, cfg.MaxRows = fc.Retain, fc.BodyLimit, fc.MaxRows
	cfg.DefaultLearner = pick("default-learner", *defaultLearner, fc.DefaultLearner)
	cfg.Units = pick("units", *units, fc.Units)
	cfg.Interval = pick("interval", *intervalMethod, fc.Interval)

	if !set["learner"] {
		ef.learners = fc.Learners
	}
	if !set["time-features"] {
		ef.timeFeatures = ef.timeFeatures || fc.Features.TimeFeatures
	}
	if !set["drift"] && fc.Drift != "" {
		ef.drift = fc.Drift
	}
	ef.leader = ef.leader || fc.Leader
	if !set["hash-buckets"] && fc.Features.HashBuckets != 0 {
		ef.hashBuckets = fc.Features.HashBuckets
	}
	if !set["max-keys"] && fc.MaxKeys != 0 {
		ef.maxKeys = fc.MaxKeys
	}
	if !set["memory-budget"] && fc.MemoryBudget != "" {
		if err := ef.memoryBudget.Set(fc.MemoryBudget); err != nil {
			problems = append(problems, fmt.Errorf("memory_budget: %w", err))
		}
	}
	if !set["numeric"] && len(fc.Features.Numeric) > 0 {
		ef.numeric = strings.Join(fc.Features.Numeric, ",")
	}
	if !set["categorical"] && len(fc.Features.Categorical) > 0 {
		ef.categorical = strings.Join(fc.Features.Categorical, ",")
	}
	if len(ef.learners) == 0 {
		problems = append(problems, errors.New("no learner: give --learner SPEC (repeatable) or learners: in the config file"))
	}
	eng, err := ef.config()
	if err != nil {
		problems = append(problems, err)
	}
	cfg.Engine = eng
	if cfg.Fields, err = ff.fields(set, fc.Fields, splitList(ef.categorical), splitList(ef.numeric)); err != nil {
		problems = append(problems, err)
	}

	cfg.History = pick("history", *history, fc.History)
	cfg.CheckpointDir = pick("checkpoint-dir", *ckDir, fc.CheckpointDir)
	cfg.Instance = pick("instance", *instance, fc.Instance)
	cfg.Advertise = pick("advertise", *advertise, fc.Advertise)
	cfg.Partitioner = pick("kafka-partitioner", *partitioner, fc.Kafka.Partitioner)
	duration := func(flagName, key string, flagVal time.Duration, fileVal string) time.Duration {
		if set[flagName] || fileVal == "" {
			return flagVal
		}
		d, err := time.ParseDuration(fileVal)
		if err != nil {
			problems = append(problems, fmt.Errorf("%s %q: %v", key, fileVal, err))
		}
		return d
	}
	cfg.ForwardTimeout = duration("forward-timeout", "kafka.forward_timeout", *forwardTimeout, fc.Kafka.ForwardTimeout)
	cfg.NoAnswerLog = !*answerLog
	if !set["answer-log"] && fc.Answers.Log != nil {
		cfg.NoAnswerLog = !*fc.Answers.Log
	}
	cfg.Engine.Served.Pending = *answerPending
	if !set["answer-pending"] && fc.Answers.Pending != 0 {
		cfg.Engine.Served.Pending = fc.Answers.Pending
	}
	cfg.Engine.Served.TTL = duration("answer-ttl", "answers.ttl", *answerTTL, fc.Answers.TTL)
	if cfg.Engine.Served.Pending < 1 {
		problems = append(problems, fmt.Errorf("--answer-pending %d: want a positive number of answers", cfg.Engine.Served.Pending))
	}
	if cfg.Engine.Served.TTL <= 0 {
		problems = append(problems, fmt.Errorf("--answer-ttl %v: want a positive duration of event time", cfg.Engine.Served.TTL))
	}

	kb := pick("kafka-brokers", *brokers, strings.Join(fc.Kafka.Brokers, ","))
	kt := pick("kafka-topic", *topic, fc.Kafka.Topic)
	if kb != "" || kt != "" {
		cfg.Kafka = &intake.KafkaConfig{Brokers: splitList(kb), Topic: kt, Group: pick("kafka-group", *group, fc.Kafka.Group),
			RebalanceTimeout: duration("kafka-rebalance-timeout", "kafka.rebalance_timeout", *rebalance, fc.Kafka.RebalanceTimeout)}
		if cfg.Kafka.RebalanceTimeout <= 0 {
			problems = append(problems, fmt.Errorf("kafka rebalance timeout %v: want a positive duration", cfg.Kafka.RebalanceTimeout))
		}
	}
	logger := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: level}))
	cfg.Log = logger
	for _, w := range warnings {
		logger.Warn(w)
	}
	if cfg.InsecureOpenNetwork && cfg.Token == "" {
		logger.Warn("INSECURE: --insecure-open-network: changing endpoints are open to anyone who reaches " + cfg.Listen)
	}
	if len(problems) == 0 {
		if err := cfg.Validate(); err != nil {
			problems = append(problems, err)
		}
	}
	if len(problems) > 0 {
		return api.Config{}, usagef("invalid configuration:\n  %s", strings.ReplaceAll(errors.Join(problems...).Error(), "\n", "\n  "))
	}
	return cfg, nil
}
