package stream

import (
	"errors"
	"math"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"rivalmix/alerts"
	"rivalmix/stream/category"
	"rivalmix/stream/input"
)

// Outcome is what became of one input message, the label of
// rivalmix_messages_total.
type Outcome string

// The outcomes of an input message.
const (
	// OutcomeApplied: the message changed the model (or was a control
	// message that was acted on) and its effect is committed.
	OutcomeApplied Outcome = "applied"
	// OutcomeDuplicate: a redelivery of an applied message, acked without
	// effect.
	OutcomeDuplicate Outcome = "duplicate"
	// OutcomeRejected: the message broke the input contract and went to
	// the rejected stream.
	OutcomeRejected Outcome = "rejected"
	// OutcomeFailed: the message could not be handled this time and is
	// left for redelivery (or, at MaxDeliver, copied to the rejected
	// stream).
	OutcomeFailed Outcome = "failed"
)

var outcomes = []Outcome{OutcomeApplied, OutcomeDuplicate, OutcomeRejected, OutcomeFailed}

// Metrics are the service's Prometheus metrics. Build them with
// [NewMetrics] on a registry that main owns; nothing is registered on
// import. The methods are safe for concurrent use.
type Metrics struct {
	messages  *prometheus.CounterVec
	update    prometheus.Histogram
	settle    prometheus.Histogram
	commit    prometheus.Histogram
	essRatio  *prometheus.GaugeVec
	distinct  *prometheus.GaugeVec
	segments  *prometheus.GaugeVec
	moves     *prometheus.CounterVec
	alerts    *prometheus.CounterVec
	surprise  *prometheus.GaugeVec
	refits    *prometheus.CounterVec
	replaces  *prometheus.CounterVec
	retries   prometheus.Counter
	rejected  *prometheus.CounterVec
	active    *prometheus.GaugeVec
	latency   prometheus.Histogram
	takeover  prometheus.Histogram
	commitErr *prometheus.CounterVec
	gaugeFunc []prometheus.Collector
}

// RejectReason is the class of rule a rejected input message broke, the
// label of rivalmix_rejected_total. The full reason travels with the
// message on the rejected stream; the label stays a short fixed set.
type RejectReason string

// The classes of rejection.
const (
	// RejectSubject: the subject names no valid category.
	RejectSubject RejectReason = "subject"
	// RejectMessage: the payload as a whole is unreadable (too large,
	// not JSON, not an object, trailing data).
	RejectMessage RejectReason = "message"
	// RejectField: one field of the payload breaks its rule.
	RejectField RejectReason = "field"
	// RejectModel: the message decoded but the category's model cannot
	// take it (category.ErrModel).
	RejectModel RejectReason = "model"
	// RejectOther: any other reason.
	RejectOther RejectReason = "other"
)

var rejectReasons = []RejectReason{RejectSubject, RejectMessage, RejectField, RejectModel, RejectOther}

// ReasonOf classifies the error a message was rejected for.
func ReasonOf(err error) RejectReason {
	var ie *input.InputError
	switch {
	case errors.As(err, &ie) && ie.Field == "subject":
		return RejectSubject
	case errors.As(err, &ie) && ie.Field == "":
		return RejectMessage
	case errors.As(err, &ie):
		return RejectField
	case errors.Is(err, category.ErrModel):
		return RejectModel
	}
	return RejectOther
}

// BuildInfo labels the rivalmix_build_info gauge.
type BuildInfo struct {
	// Version is the main module's version ("(devel)" for a source build).
	Version string
	// GoVersion is the Go release that built the binary, e.g. "go1.26.0".
	GoVersion string
	// Revision is the source revision (vcs.revision), "unknown" when the
	// build recorded none.
	Revision string
}

// NewBuildInfo returns the rivalmix_build_info gauge, always 1, whose
// labels say which build is running (the Prometheus convention for
// joining a build's identity onto other series). Register it beside
// [NewMetrics]; empty fields are exposed as "unknown".
func NewBuildInfo(bi BuildInfo) prometheus.Collector {
	or := func(s string) string {
		if s == "" {
			return "unknown"
		}
		return s
	}
	g := prometheus.NewGauge(prometheus.GaugeOpts{
		Name: "rivalmix_build_info",
		Help: "Always 1; the labels name the running build's module version, Go version and source revision.",
		ConstLabels: prometheus.Labels{
			"version": or(bi.Version), "goversion": or(bi.GoVersion), "revision": or(bi.Revision),
		},
	})
	g.Set(1)
	return g
}

// NewMetrics creates the metrics and registers them with reg (not
// registered when reg is nil). outboxPending and consumerPending back the
// rivalmix_outbox_pending and rivalmix_consumer_pending gauges and are
// called at every scrape, so they must return a value the caller already
// keeps (a count, or Service.ConsumerPending, which a background refresh
// keeps), never make a network round trip; a nil function leaves its
// gauge out. It panics if reg already holds metrics of the same names,
// which is a wiring mistake.
func NewMetrics(reg prometheus.Registerer, outboxPending, consumerPending func() float64) *Metrics {
	m := &Metrics{
		messages: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "rivalmix_messages_total",
			Help: "Input messages handled, by outcome (applied, duplicate, rejected, failed).",
		}, []string{"outcome"}),
		update: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name:    "rivalmix_update_seconds",
			Help:    "Time to apply one input message to its category's particle system, in seconds.",
			Buckets: prometheus.ExponentialBuckets(1e-5, 4, 10), // 10 us .. 2.6 s
		}),
		settle: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name:    "rivalmix_settle_seconds",
			Help:    "Time to settle a category (resample, rejuvenate, summarise, evaluate alerts), in seconds.",
			Buckets: prometheus.ExponentialBuckets(1e-3, 3, 10), // 1 ms .. 20 s
		}),
		commit: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name:    "rivalmix_commit_seconds",
			Help:    "Time to commit one micro-batch to the state file, fsync included, in seconds.",
			Buckets: prometheus.ExponentialBuckets(1e-4, 3, 10), // 0.1 ms .. 2 s
		}),
		essRatio: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "rivalmix_ess_ratio",
			Help: "Effective sample size of the category's particles divided by their number, in (0, 1], at the last refit.",
		}, []string{"category"}),
		distinct: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "rivalmix_distinct_states_ratio",
			Help: "Distinct partitions among the category's particles divided by their number, in (0, 1], at the last refit (the updater renews its particles between refits when this falls below diversity_floor).",
		}, []string{"category"}),
		segments: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "rivalmix_segments",
			Help: "Segments in the category's point segmentation at the last refit.",
		}, []string{"category"}),
		moves: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "rivalmix_segment_moves_total",
			Help: "Products whose reported segment changed.",
		}, []string{"category"}),
		alerts: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "rivalmix_alerts_total",
			Help: "Missed-competitor alerts raised.",
		}, []string{"category"}),
		surprise: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "rivalmix_surprise_mean",
			Help: "Mean negative log predictive density, in nats, of the data the last refit of the category added or replaced.",
		}, []string{"category"}),
		refits: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "rivalmix_refits_total",
			Help: "Refits completed.",
		}, []string{"category"}),
		replaces: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "rivalmix_replaces_total",
			Help: "Product refits applied, by form: kept (each particle kept the product's segment) or redrawn (placed afresh).",
		}, []string{"form"}),
		retries: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "rivalmix_rejected_publish_failures_total",
			Help: "Failed attempts to publish a rejected input message to the rejected stream (each is retried).",
		}),
		rejected: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "rivalmix_rejected_total",
			Help: "Input messages filed on the rejected stream, by the class of rule broken (subject, message, field, model, other).",
		}, []string{"reason"}),
		active: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "rivalmix_active_alerts",
			Help: "Products of the category with a missed-competitor alert in force after its last refit.",
		}, []string{"category"}),
		latency: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name:    "rivalmix_refit_latency_seconds",
			Help:    "Time from a refit-complete message's arrival in the input stream to the commit of the refit's summary and alerts to the outbox, in seconds.",
			Buckets: prometheus.ExponentialBuckets(1e-2, 2.5, 10), // 10 ms .. 38 s
		}),
		commitErr: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "rivalmix_commit_failures_total",
			Help: "Commits to the state file that failed and are retried, by reason (disk_full).",
		}, []string{"reason"}),
		takeover: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name:    "rivalmix_partition_take_seconds",
			Help:    "Time to take over a claimed partition (read its mirrored state, restore its categories, re-create its consumer), in seconds.",
			Buckets: prometheus.ExponentialBuckets(1e-3, 3, 10), // 1 ms .. 20 s
		}),
	}
	for _, o := range outcomes {
		m.messages.WithLabelValues(string(o)) // start every outcome at 0
	}
	m.commitErr.WithLabelValues("disk_full")
	m.replaces.WithLabelValues("kept")
	m.replaces.WithLabelValues("redrawn")
	for _, r := range rejectReasons {
		m.rejected.WithLabelValues(string(r))
	}
	if outboxPending != nil {
		m.gaugeFunc = append(m.gaugeFunc, prometheus.NewGaugeFunc(prometheus.GaugeOpts{
			Name: "rivalmix_outbox_pending",
			Help: "Events committed to the outbox and not yet acknowledged by the output stream.",
		}, outboxPending))
	}
	if consumerPending != nil {
		m.gaugeFunc = append(m.gaugeFunc, prometheus.NewGaugeFunc(prometheus.GaugeOpts{
			Name: "rivalmix_consumer_pending",
			Help: "Input messages in the stream not yet delivered to the worker's consumer.",
		}, consumerPending))
	}
	if reg != nil {
		reg.MustRegister(m.messages, m.update, m.settle, m.commit, m.essRatio, m.distinct, m.segments,
			m.moves, m.alerts, m.surprise, m.refits, m.replaces, m.retries, m.rejected, m.active, m.latency,
			m.takeover, m.commitErr)
		reg.MustRegister(m.gaugeFunc...)
	}
	return m
}

// CountMessages adds n messages with the given outcome.
func (m *Metrics) CountMessages(o Outcome, n int) {
	if n > 0 {
		m.messages.WithLabelValues(string(o)).Add(float64(n))
	}
}

// CountRejected counts one message filed on the rejected stream.
func (m *Metrics) CountRejected(r RejectReason) { m.rejected.WithLabelValues(string(r)).Inc() }

// SetActiveAlerts sets the number of products of cat with an alert in
// force (category.Worker.ActiveAlerts).
func (m *Metrics) SetActiveAlerts(cat string, n int) { m.active.WithLabelValues(cat).Set(float64(n)) }

// ObserveRefitLatency records the time from a refit-complete message's
// arrival to the commit of its refit's events; a negative duration (the
// server's clock ahead of ours) counts as 0.
func (m *Metrics) ObserveRefitLatency(d time.Duration) { m.latency.Observe(max(d, 0).Seconds()) }

// CountReplace counts one applied product refit by its form.
func (m *Metrics) CountReplace(kept bool) {
	form := "redrawn"
	if kept {
		form = "kept"
	}
	m.replaces.WithLabelValues(form).Inc()
}

// CountRejectRetry counts one failed publication of a rejected message.
func (m *Metrics) CountRejectRetry() { m.retries.Inc() }

// ObserveUpdate records the time one message took to apply.
func (m *Metrics) ObserveUpdate(d time.Duration) { m.update.Observe(d.Seconds()) }

// ObserveSettle records the time a category took to settle.
func (m *Metrics) ObserveSettle(d time.Duration) { m.settle.Observe(d.Seconds()) }

// CountCommitFailure counts one failed commit that is retried.
func (m *Metrics) CountCommitFailure(reason string) { m.commitErr.WithLabelValues(reason).Inc() }

// ObserveTakeover records the time taking over one partition took.
func (m *Metrics) ObserveTakeover(d time.Duration) { m.takeover.Observe(d.Seconds()) }

// ObserveCommit records the time one state commit took.
func (m *Metrics) ObserveCommit(d time.Duration) { m.commit.Observe(d.Seconds()) }

// ObserveRefit records a completed refit: it counts the refit, its moved
// and missed events, and sets the category's segment count, its ESS ratio
// and distinct-states ratio (rep.ESS and rep.Distinct over particles,
// skipped when particles <= 0) and its mean surprise
// (skipped when the refit changed no datum or the value is not finite).
func (m *Metrics) ObserveRefit(rep category.RefitReport, particles int) {
	cat := rep.Category
	m.refits.WithLabelValues(cat).Inc()
	m.segments.WithLabelValues(cat).Set(float64(len(rep.Summary.Segments)))
	if particles > 0 {
		m.essRatio.WithLabelValues(cat).Set(rep.ESS / float64(particles))
		m.distinct.WithLabelValues(cat).Set(float64(rep.Distinct) / float64(particles))
	}
	if rep.Changes > 0 && !math.IsNaN(rep.MeanSurprise) && !math.IsInf(rep.MeanSurprise, 0) {
		m.surprise.WithLabelValues(cat).Set(rep.MeanSurprise)
	}
	var moves, missed int
	for _, ev := range rep.Events {
		switch ev.Kind {
		case alerts.KindMoved:
			moves++
		case alerts.KindMissed:
			missed++
		}
	}
	// Add(0) still creates the series, so a category shows 0 rather
	// than nothing until its first move or alert.
	m.moves.WithLabelValues(cat).Add(float64(moves))
	m.alerts.WithLabelValues(cat).Add(float64(missed))
}
