package api

import (
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"time"

	"tidemark/api/intake"
	"tidemark/checkpoint"
	"tidemark/learner"
)

// Defaults of Config.
const (
	DefaultListen             = "127.0.0.1:8080"
	DefaultCheckpointEvery    = 10_000
	DefaultCheckpointInterval = 5 * time.Minute
	DefaultBodyLimit          = 16 << 20
	DefaultMaxRows            = 10_000
	DefaultMinScored          = 10
	DefaultPublishEvery       = 200 * time.Millisecond
	DefaultCurvePoints        = 2000
	DefaultCurveEvery         = 100
	DefaultMaxDriftPins       = 10
	DefaultDeadLetterBytes    = 64 << 20
	DefaultForwardTimeout     = 2 * time.Second
)

// Interval methods (Config.Interval).
const (
	IntervalConformal = "conformal"
	IntervalNormal    = "normal"
)

// Config configures the service. Zero fields take the defaults.
type Config struct {
	Listen  string // HTTP address. Default: DefaultListen (loopback only).
	DataDir string // journal/, checkpoints/, deadletters.ndjson. Required.
	Engine  learner.Config
	// Token, when set, is required as "Authorization: Bearer <token>" on every
	// changing endpoint. Default: none (changing endpoints are open; the
	// default listen address is loopback). Without a token the service only
	// listens on a loopback address unless InsecureOpenNetwork is set.
	Token string
	// InsecureOpenNetwork lets the service listen beyond loopback without a
	// token, so that anyone who reaches it can change the model. Default: false.
	InsecureOpenNetwork bool
	// AllowedHosts are host names (besides IP addresses and localhost) that
	// requests may be addressed to; a guard against DNS rebinding. Default: none.
	AllowedHosts []string
	// TokenForReads requires the token on reads too: learners, curves,
	// checkpoints, metrics and the page (key names can be sensitive).
	// /healthz, /readyz and the OpenAPI document stay open. Default: false.
	TokenForReads bool
	// ReadyMaxLag, when positive, reports not ready while more events than
	// this wait in the source to be applied. Default: 0 (no bound).
	ReadyMaxLag int64
	// AllowedOrigins are web origins (scheme://host[:port]) besides the
	// service's own whose pages may send changing requests. Default: none.
	AllowedOrigins []string
	// CheckpointEvery is the number of applied events between periodic
	// checkpoints. Default: DefaultCheckpointEvery.
	CheckpointEvery int64
	// CheckpointInterval takes a checkpoint this long after the last one when
	// events were applied since. Default: DefaultCheckpointInterval.
	CheckpointInterval time.Duration
	Retain             int   // checkpoints kept besides pinned ones. Default: the store's (20).
	BodyLimit          int64 // bytes of a request body. Default: DefaultBodyLimit.
	MaxRows            int   // rows of a predict request, events of a POST. Default: DefaultMaxRows.
	// MinScored is how many events a learner must have been scored on for a
	// key before predict answers for it. Default: DefaultMinScored; negative
	// means no minimum.
	MinScored int64
	// MaxDriftPins is how many checkpoints pinned automatically before drift
	// alarms are kept pinned (the newest); older automatic pins are lifted.
	// Pins an operator made are never lifted. Default: DefaultMaxDriftPins.
	MaxDriftPins int
	// DefaultLearner answers predict requests that name none. Default: the first.
	DefaultLearner string
	// Units names the target's units (kW, s), for the page. Default: none.
	Units string
	// Interval is the method of the intervals predict quotes: IntervalConformal
	// or IntervalNormal (their level is Engine.Score.Level). Default:
	// IntervalConformal.
	Interval string
	// PublishEvery is the longest a published snapshot (what predict and the
	// read endpoints see) lags the engine. Default: DefaultPublishEvery.
	PublishEvery time.Duration
	// CurveEvery is the number of applied events between points of the error
	// curves; CurvePoints the points kept per learner. Defaults:
	// DefaultCurveEvery, DefaultCurvePoints.
	CurveEvery  int64
	CurvePoints int
	// Kafka, when set, is the event source instead of the local journal,
	// and the service is an instance of the consumer group Kafka.Group
	// (group.go): the instances split the topic's partitions, and the state
	// of each partition is checkpointed to a store of its own under
	// CheckpointDir, which every instance must reach.
	Kafka *intake.KafkaConfig
	// CheckpointDir is where checkpoints are kept. Default: DataDir/checkpoints.
	// With Kafka, a directory every instance of the group reaches (a shared
	// file system), one subdirectory per partition.
	CheckpointDir string
	// Instance names this instance in its consumer group, in /v1/cluster and
	// in the checkpoints it writes. Default: Advertise.
	Instance string
	// Advertise is the address other instances of the group reach this one
	// at, scheme included (http://10.0.0.7:8080). Default: the listen
	// address (this host's name when it listens on every interface).
	Advertise string
	// Partitioner names the function from a key to its partition, which
	// must be the producers' (intake.Partitioners). Default: murmur2.
	Partitioner string
	// ForwardTimeout bounds a request forwarded to another instance of the
	// group (a predict for a key it owns, its part of a group-wide view).
	// Default: DefaultForwardTimeout.
	ForwardTimeout time.Duration
	// Fields maps the fields of the events of every source — history files,
	// the journal, Kafka messages — onto an event's (intake.Fields): other
	// names, nested paths, objects of features, time formats. Default: the
	// events are in tidemark's own shape.
	Fields intake.Fields
	// NoAnswerLog turns served scoring off: predict answers carry no
	// answer_id and nothing is written per answer. Default: false (every
	// answer is registered and logged before it is returned).
	NoAnswerLog bool
	// History, when set, is a history file (NDJSON, plain, .gz or
	// .zst) to learn from instead of the local journal: each line's position
	// is its line number. Default: none (the journal).
	History string
	// Log receives operational messages; never tokens or event payloads at
	// Info level. Nil discards them.
	Log *slog.Logger
	// DeadLetterBytes bounds the dead-letter file: past it the file is
	// rotated to deadletters.1.ndjson. Default: DefaultDeadLetterBytes.
	DeadLetterBytes int64
	// Journal segment size; zero for the intake default.
	JournalSegmentBytes int64
	// TLSCert and TLSKey, both or neither, serve HTTPS with that certificate
	// and key (PEM files). Default: plain HTTP.
	TLSCert, TLSKey string
	// JournalFile and CheckpointFS are the file-system seams (nil: the OS);
	// tests inject failures such as a full disk through them.
	JournalFile  func(*os.File) intake.File
	CheckpointFS checkpoint.FS
}

// Validate reports every problem with c. It changes nothing.
func (c *Config) Validate() error {
	var errs []error
	if err := c.Fields.Validate(); err != nil {
		errs = append(errs, fmt.Errorf("field mapping: %w", err))
	}
	if c.DataDir == "" {
		errs = append(errs, errors.New("data directory: required (--data DIR)"))
	}
	listen := c.Listen
	if listen == "" {
		listen = DefaultListen
	}
	if host, _, err := net.SplitHostPort(listen); err != nil {
		errs = append(errs, fmt.Errorf("listen address %q: %v", listen, err))
	} else if c.Token == "" && !c.InsecureOpenNetwork && !loopback(host) {
		errs = append(errs, fmt.Errorf("listen address %q reaches beyond this machine, and without a token anyone who reaches it could change the model: "+
			"give a token (--token-file), listen on 127.0.0.1, or say --insecure-open-network", listen))
	}
	if err := c.Engine.Validate(); err != nil {
		errs = append(errs, err)
	}
	if c.CheckpointEvery < 0 {
		errs = append(errs, fmt.Errorf("checkpoint every %d events: want a positive number", c.CheckpointEvery))
	}
	if c.CheckpointInterval < 0 {
		errs = append(errs, fmt.Errorf("checkpoint interval %v: want a positive duration", c.CheckpointInterval))
	}
	if c.TokenForReads && c.Token == "" {
		errs = append(errs, errors.New("token for reads: give a token too (--token-file)"))
	}
	if c.ReadyMaxLag < 0 {
		errs = append(errs, fmt.Errorf("ready max lag %d: want 0 (no bound) or a positive number of events", c.ReadyMaxLag))
	}
	for _, v := range []struct {
		name string
		n    int64
	}{{"body limit", c.BodyLimit}, {"max rows", int64(c.MaxRows)}, {"retain", int64(c.Retain)}, {"dead-letter bound", c.DeadLetterBytes}} {
		if v.n < 0 {
			errs = append(errs, fmt.Errorf("%s %d: must not be negative (0 takes the default)", v.name, v.n))
		}
	}
	if c.DefaultLearner != "" {
		found := false
		for _, s := range c.Engine.Learners {
			found = found || s.Name == c.DefaultLearner
		}
		if !found {
			errs = append(errs, fmt.Errorf("default learner %q: not among the configured learners (%s)", c.DefaultLearner, c.Engine.Names()))
		}
	}
	if (c.TLSCert == "") != (c.TLSKey == "") {
		errs = append(errs, errors.New("TLS: give both --tls-cert and --tls-key, or neither"))
	}
	for _, f := range []string{c.TLSCert, c.TLSKey} {
		if f != "" {
			if _, err := os.Stat(f); err != nil {
				errs = append(errs, fmt.Errorf("TLS: %v", err))
			}
		}
	}
	if c.Kafka != nil {
		if err := c.Kafka.Validate(); err != nil {
			errs = append(errs, err)
		}
		if c.History != "" {
			errs = append(errs, errors.New("sources: give Kafka or a history file, not both"))
		}
	}
	if _, ok := intake.Partitioners[c.Partitioner]; c.Partitioner != "" && !ok {
		errs = append(errs, fmt.Errorf("partitioner %q: want murmur2 (the Java client's default), fnv1a or crc32, whichever the producers use", c.Partitioner))
	}
	if c.Advertise != "" {
		if u, err := url.Parse(c.Advertise); err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
			errs = append(errs, fmt.Errorf("advertised address %q: want http://host:port or https://host:port", c.Advertise))
		}
	}
	if c.Interval != "" && c.Interval != IntervalConformal && c.Interval != IntervalNormal {
		errs = append(errs, fmt.Errorf("interval %q: want conformal (adapts to the misses it sees) or normal (± z × recent RMSE)", c.Interval))
	}
	if c.ForwardTimeout < 0 {
		errs = append(errs, fmt.Errorf("forward timeout %v: want a positive duration", c.ForwardTimeout))
	}
	return errors.Join(errs...)
}

// loopback reports whether host (of a listen address) is only reachable
// from this machine.
func loopback(host string) bool {
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

func (c *Config) setDefaults() {
	if c.Listen == "" {
		c.Listen = DefaultListen
	}
	if c.CheckpointEvery == 0 {
		c.CheckpointEvery = DefaultCheckpointEvery
	}
	if c.CheckpointInterval == 0 {
		c.CheckpointInterval = DefaultCheckpointInterval
	}
	if c.BodyLimit == 0 {
		c.BodyLimit = DefaultBodyLimit
	}
	if c.MaxRows == 0 {
		c.MaxRows = DefaultMaxRows
	}
	if c.MinScored == 0 {
		c.MinScored = DefaultMinScored
	}
	if c.DefaultLearner == "" && len(c.Engine.Learners) > 0 {
		c.DefaultLearner = c.Engine.Learners[0].Name
	}
	if c.PublishEvery == 0 {
		c.PublishEvery = DefaultPublishEvery
	}
	if c.CurveEvery == 0 {
		c.CurveEvery = DefaultCurveEvery
	}
	if c.DeadLetterBytes == 0 {
		c.DeadLetterBytes = DefaultDeadLetterBytes
	}
	if c.MaxDriftPins == 0 {
		c.MaxDriftPins = DefaultMaxDriftPins
	}
	if c.CurvePoints == 0 {
		c.CurvePoints = DefaultCurvePoints
	}
	if c.CheckpointDir == "" {
		c.CheckpointDir = filepath.Join(c.DataDir, "checkpoints")
	}
	if c.Partitioner == "" {
		c.Partitioner = intake.DefaultPartitioner
	}
	if c.ForwardTimeout == 0 {
		c.ForwardTimeout = DefaultForwardTimeout
	}
	if c.Interval == "" {
		c.Interval = IntervalConformal
	}
	if c.Log == nil {
		c.Log = slog.New(slog.DiscardHandler)
	}
}
