package api

import (
	"net/http"
	"strconv"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// metrics is the service's Prometheus registry (its own, not the global
// one). Counters the handlers bump live here; everything else — the model,
// readiness, lag, the source's connection, dead letters — is read from the
// published snapshot at scrape time.
type metrics struct {
	reg                *prometheus.Registry
	predictLatency     prometheus.Histogram
	eventsReceived     prometheus.Counter
	journalFailures    prometheus.Counter
	checkpointFailures prometheus.Counter
	faults             *prometheus.CounterVec
	lost               prometheus.Counter
	rejections         *prometheus.CounterVec
	byReason           sync.Map // reason → prometheus.Counter of rejections, looked up once
	refused            *prometheus.CounterVec
}

func newMetrics(s *Service) *metrics {
	m := &metrics{reg: prometheus.NewRegistry()}
	m.predictLatency = prometheus.NewHistogram(prometheus.HistogramOpts{Name: "tidemark_predict_duration_seconds",
		Help: "Time to answer POST /v1/predict.", Buckets: prometheus.ExponentialBuckets(50e-6, 2, 16)})
	m.eventsReceived = prometheus.NewCounter(prometheus.CounterOpts{Name: "tidemark_http_events_accepted_total",
		Help: "Events accepted by POST /v1/events (durable in the journal)."})
	m.journalFailures = prometheus.NewCounter(prometheus.CounterOpts{Name: "tidemark_journal_write_failures_total",
		Help: "POST /v1/events requests refused because the journal could not store them."})
	m.checkpointFailures = prometheus.NewCounter(prometheus.CounterOpts{Name: "tidemark_checkpoint_failures_total",
		Help: "Checkpoints that could not be written."})
	m.faults = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "tidemark_intake_faults_total",
		Help: "Conditions of the data directory that stopped intake: vanished (journal files gone) or damage (a journal record cannot be read)."}, []string{"kind"})
	m.lost = prometheus.NewCounter(prometheus.CounterOpts{Name: "tidemark_journal_lost_events_total",
		Help: "Events given up because the journal was damaged, on the operator's request (POST /v1/intake/skip-damaged)."})
	m.rejections = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "tidemark_stream_rejections_total",
		Help: "Events of the stream the engine refused when applying them, by reason: decode, schema, time, key_cap (they go to the dead-letter file)."}, []string{"reason"})
	m.refused = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "tidemark_http_events_refused_total",
		Help: "Events POST /v1/events refused before journalling them, by reason: decode, schema, time, key_cap."}, []string{"reason"})
	m.reg.MustRegister(m.predictLatency, m.eventsReceived, m.journalFailures, m.checkpointFailures, m.faults, m.lost, m.rejections, m.refused, &snapshotCollector{s})
	return m
}

func (m *metrics) handler() http.Handler {
	return promhttp.HandlerFor(m.reg, promhttp.HandlerOpts{})
}

// snapshotCollector exports the published snapshot.
type snapshotCollector struct{ s *Service }

var (
	descApplied  = prometheus.NewDesc("tidemark_events_applied_total", "Events trained on.", nil, nil)
	descRejected = prometheus.NewDesc("tidemark_events_rejected_total", "Events refused (bad input or schema), never trained on.", nil, nil)
	descSkipped  = prometheus.NewDesc("tidemark_events_skipped_total", "Events passed over: by a restore that skipped a range, or lost to journal damage the operator skipped.", nil, nil)
	descDead     = prometheus.NewDesc("tidemark_dead_letters_total", "Rejected stream events written to the dead-letter file since start.", nil, nil)
	descRMSE     = prometheus.NewDesc("tidemark_learner_rmse", "Prequential RMSE of a learner over all scored events or the recent window.", []string{"learner", "window"}, nil)
	descMAE      = prometheus.NewDesc("tidemark_learner_mae", "Prequential MAE of a learner over all scored events or the recent window.", []string{"learner", "window"}, nil)
	descSkill    = prometheus.NewDesc("tidemark_learner_skill", "1 − rmse/rmse of the mean baseline.", []string{"learner"}, nil)
	descScored   = prometheus.NewDesc("tidemark_learner_scored_total", "Events a learner was scored on.", []string{"learner"}, nil)
	descDrift    = prometheus.NewDesc("tidemark_learner_drift_state", "Drift watch: 0 stable, 1 warning, 2 drift.", []string{"learner"}, nil)
	descAlarms   = prometheus.NewDesc("tidemark_learner_drift_alarms_total", "Page–Hinkley alarms raised.", []string{"learner"}, nil)
	descCkVer    = prometheus.NewDesc("tidemark_checkpoint_version", "Version of the newest checkpoint written or restored.", nil, nil)
	descCkAge    = prometheus.NewDesc("tidemark_checkpoint_age_seconds", "Seconds since that checkpoint was created.", nil, nil)
	descCkBytes  = prometheus.NewDesc("tidemark_checkpoint_bytes", "Size of that checkpoint file.", nil, nil)
	descLag      = prometheus.NewDesc("tidemark_intake_lag_events", "Events in the source not yet applied, per partition.", []string{"partition"}, nil)
	descReady    = prometheus.NewDesc("tidemark_ready", "1 once restored and caught up with the stream.", nil, nil)
	descConn     = prometheus.NewDesc("tidemark_intake_connected", "1 while the Kafka brokers answer (Kafka intake only).", nil, nil)
	descState    = prometheus.NewDesc("tidemark_state_bytes", "Bytes the model state holds, as estimated from its windows and coefficients (what the memory budget is held to).", nil, nil)
	descBudget   = prometheus.NewDesc("tidemark_memory_budget_bytes", "The memory budget: events of new keys are rejected (reason memory_budget) while the state is at or past it; 0 for none.", nil, nil)
	descKeys     = prometheus.NewDesc("tidemark_keys", "Distinct keys in the state.", nil, nil)
	descOwned    = prometheus.NewDesc("tidemark_partition_owned", "Consumer group: 1 for each partition of the topic this instance owns, 0 for the others (summed over the instances, 1 per partition once the group is settled).", []string{"partition"}, nil)
	descPartCk   = prometheus.NewDesc("tidemark_partition_checkpoint_age_seconds", "Consumer group: seconds since the newest checkpoint of an owned partition was created.", []string{"partition"}, nil)
	descPartVer  = prometheus.NewDesc("tidemark_partition_checkpoint_version", "Consumer group: the newest checkpoint version of an owned partition (its store's own numbering).", []string{"partition"}, nil)
	descGen      = prometheus.NewDesc("tidemark_group_generation", "Consumer group: the generation this instance is in (it grows with every rebalance).", nil, nil)
	descAnswers  = prometheus.NewDesc("tidemark_answers_served_total", "Predict answers registered for served scoring, per learner asked (or leader).", []string{"learner"}, nil)
	descLabelled = prometheus.NewDesc("tidemark_answers_labelled_total", "Answers scored against their labels.", []string{"learner"}, nil)
	descServedE  = prometheus.NewDesc("tidemark_answer_rmse", "RMSE of the answers as served, against their labels: over all labelled answers, or fading (the prequential fading factor). Compare with tidemark_learner_rmse.", []string{"learner", "window"}, nil)
	descPending  = prometheus.NewDesc("tidemark_answers_pending", "Answers waiting for their labels.", nil, nil)
	descDropped  = prometheus.NewDesc("tidemark_answers_dropped_total", "Answers dropped before a label came: expired (waited longer than --answer-ttl of event time) or evicted (--answer-pending reached).", []string{"reason"}, nil)
	descUnmatch  = prometheus.NewDesc("tidemark_answer_labels_unmatched_total", "Labels naming no waiting answer (unknown, labelled already, dropped).", nil, nil)
	descDelay    = prometheus.NewDesc("tidemark_answer_label_delay_seconds", "Label delay of the answers labelled, in event time.", []string{"learner"}, nil)
	descStopped  = prometheus.NewDesc("tidemark_intake_stopped", "1 while a fault of the data directory stops intake (see /readyz for what and why).", nil, nil)
)

func (c *snapshotCollector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{descApplied, descRejected, descSkipped, descDead, descRMSE, descMAE, descSkill,
		descScored, descDrift, descAlarms, descCkVer, descCkAge, descCkBytes, descLag, descReady, descConn, descStopped, descState, descBudget, descKeys,
		descOwned, descPartCk, descPartVer, descGen, descAnswers, descLabelled, descServedE, descPending, descDropped, descUnmatch, descDelay} {
		ch <- d
	}
}

func (c *snapshotCollector) Collect(ch chan<- prometheus.Metric) {
	snap := c.s.snap.Load()
	if snap == nil {
		return
	}
	r := snap.state.report
	gauge := func(d *prometheus.Desc, v float64, labels ...string) {
		ch <- prometheus.MustNewConstMetric(d, prometheus.GaugeValue, v, labels...)
	}
	counter := func(d *prometheus.Desc, v float64, labels ...string) {
		ch <- prometheus.MustNewConstMetric(d, prometheus.CounterValue, v, labels...)
	}
	counter(descApplied, float64(r.Events))
	counter(descRejected, float64(r.Rejected))
	counter(descSkipped, float64(r.Skipped))
	counter(descDead, float64(snap.dead))
	gauge(descState, float64(r.StateBytes))
	gauge(descBudget, float64(c.s.cfg.Engine.MemoryBudget))
	gauge(descKeys, float64(r.Keys))
	for _, l := range r.Learners {
		if l.RMSE != nil {
			gauge(descRMSE, *l.RMSE, l.Name, "all")
			gauge(descMAE, *l.MAE, l.Name, "all")
		}
		if l.Recent.RMSE != nil {
			gauge(descRMSE, *l.Recent.RMSE, l.Name, "recent")
			gauge(descMAE, *l.Recent.MAE, l.Name, "recent")
		}
		if l.Skill != nil {
			gauge(descSkill, *l.Skill, l.Name)
		}
		counter(descScored, float64(l.Scored), l.Name)
		state := map[string]float64{"stable": 0, "warning": 1, "drift": 2}[l.Drift.State]
		gauge(descDrift, state, l.Name)
		counter(descAlarms, float64(l.Drift.Alarms), l.Name)
	}
	if sv := r.Served; sv != nil {
		rows := sv.Learners
		if sv.Leader != nil {
			rows = append(rows[:len(rows):len(rows)], *sv.Leader)
		}
		for _, m := range rows {
			counter(descAnswers, float64(m.Answers), m.Name)
			counter(descLabelled, float64(m.Labelled), m.Name)
			if m.RMSE != nil {
				gauge(descServedE, *m.RMSE, m.Name, "all")
			}
			if m.FadingRMSE != nil {
				gauge(descServedE, *m.FadingRMSE, m.Name, "fading")
			}
			if m.Delay.N > 0 {
				buckets := map[float64]uint64{}
				var cum uint64
				for i, b := range m.Delay.BoundsSeconds {
					cum += uint64(m.Delay.Buckets[i])
					buckets[b] = cum
				}
				ch <- prometheus.MustNewConstHistogram(descDelay, uint64(m.Delay.N), *m.Delay.MeanSeconds*float64(m.Delay.N), buckets, m.Name)
			}
		}
		gauge(descPending, float64(sv.Pending))
		counter(descDropped, float64(sv.Expired), "expired")
		counter(descDropped, float64(sv.Evicted), "evicted")
		counter(descUnmatch, float64(sv.Unmatched))
	}
	if ck := snap.state.ck; ck.Version > 0 {
		gauge(descCkVer, float64(ck.Version))
		gauge(descCkAge, time.Since(ck.Created).Seconds())
		gauge(descCkBytes, float64(ck.Bytes))
	}
	for _, l := range snap.lag {
		gauge(descLag, float64(l.Offset), strconv.Itoa(int(l.Partition)))
	}
	if g := snap.group; g != nil {
		gauge(descGen, float64(g.Generation))
		for p := range int32(c.s.kafka.Partitions()) {
			gauge(descOwned, b2f(snap.owns(p)), strconv.Itoa(int(p)))
		}
		for _, pv := range g.Partitions {
			if pv.CheckpointCreated != nil {
				gauge(descPartCk, time.Since(*pv.CheckpointCreated).Seconds(), strconv.Itoa(int(pv.Partition)))
				gauge(descPartVer, float64(pv.Checkpoint), strconv.Itoa(int(pv.Partition)))
			}
		}
	}
	if snap.connected != nil {
		conn := 0.0
		if *snap.connected {
			conn = 1
		}
		gauge(descConn, conn)
	}
	ready, stopped := 0.0, 0.0
	if snap.ready && snap.fault == nil {
		ready = 1
	}
	if snap.fault != nil {
		stopped = 1
	}
	gauge(descReady, ready)
	gauge(descStopped, stopped)
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// rejected returns the rejection counter of a reason.
func (m *metrics) rejected(reason string) prometheus.Counter {
	if c, ok := m.byReason.Load(reason); ok {
		return c.(prometheus.Counter)
	}
	c := m.rejections.WithLabelValues(reason)
	m.byReason.Store(reason, c)
	return c
}
