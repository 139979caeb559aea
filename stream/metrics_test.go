package stream

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"

	"rivalmix/alerts"
	"rivalmix/sequential"
	"rivalmix/stream/category"
	"rivalmix/stream/input"
)

func TestMetrics(t *testing.T) {
	t.Parallel()
	reg := prometheus.NewRegistry()
	m := NewMetrics(reg, func() float64 { return 3 }, func() float64 { return 17 })

	m.CountMessages(OutcomeApplied, 5)
	m.CountMessages(OutcomeDuplicate, 1)
	m.CountMessages(OutcomeRejected, 0)
	m.ObserveUpdate(200 * time.Microsecond)
	m.ObserveSettle(40 * time.Millisecond)
	m.ObserveCommit(3 * time.Millisecond)
	m.CountRejectRetry()
	m.CountRejectRetry()
	m.CountReplace(true)
	m.CountReplace(false)
	m.CountReplace(false)
	rep := category.RefitReport{
		Category: "cereal", Refit: "2026-W48", ESS: 192, MeanSurprise: 1.25, Changes: 4,
		Summary: sequential.Summary{Segments: make([]sequential.SegmentSummary, 3)},
		Events: []alerts.Event{
			{Kind: alerts.KindMoved}, {Kind: alerts.KindMoved}, {Kind: alerts.KindMissed}, {Kind: alerts.KindSummary},
		},
	}
	m.ObserveRefit(rep, 256)
	m.SetActiveAlerts("cereal", 4)
	m.SetActiveAlerts("cereal", 2) // a gauge: the latest refit's count
	m.CountRejected(RejectField)
	m.CountRejected(RejectField)
	m.CountRejected(RejectModel)
	m.ObserveRefitLatency(1500 * time.Millisecond)
	m.ObserveRefitLatency(-time.Second) // server clock ahead: counted as 0
	// A refit that changed nothing keeps the last surprise.
	m.ObserveRefit(category.RefitReport{Category: "cereal", Refit: "2026-W49", ESS: 128, MeanSurprise: math.NaN(),
		Summary: rep.Summary}, 256)

	for _, c := range []prometheus.Collector{m.messages, m.update, m.settle, m.commit, m.essRatio, m.distinct, m.segments,
		m.moves, m.alerts, m.surprise, m.refits, m.replaces, m.retries, m.rejected, m.active, m.latency,
		m.gaugeFunc[0], m.gaugeFunc[1]} {
		problems, err := testutil.CollectAndLint(c)
		if err != nil {
			t.Fatalf("CollectAndLint: %v", err)
		}
		for _, p := range problems {
			t.Errorf("lint: %s: %s", p.Metric, p.Text)
		}
	}
	problems, err := testutil.GatherAndLint(reg)
	if err != nil {
		t.Fatalf("GatherAndLint: %v", err)
	}
	for _, p := range problems {
		t.Errorf("lint: %s: %s", p.Metric, p.Text)
	}

	want := `
# HELP rivalmix_messages_total Input messages handled, by outcome (applied, duplicate, rejected, failed).
# TYPE rivalmix_messages_total counter
rivalmix_messages_total{outcome="applied"} 5
rivalmix_messages_total{outcome="duplicate"} 1
rivalmix_messages_total{outcome="failed"} 0
rivalmix_messages_total{outcome="rejected"} 0
# HELP rivalmix_ess_ratio Effective sample size of the category's particles divided by their number, in (0, 1], at the last refit.
# TYPE rivalmix_ess_ratio gauge
rivalmix_ess_ratio{category="cereal"} 0.5
# HELP rivalmix_segments Segments in the category's point segmentation at the last refit.
# TYPE rivalmix_segments gauge
rivalmix_segments{category="cereal"} 3
# HELP rivalmix_segment_moves_total Products whose reported segment changed.
# TYPE rivalmix_segment_moves_total counter
rivalmix_segment_moves_total{category="cereal"} 2
# HELP rivalmix_alerts_total Missed-competitor alerts raised.
# TYPE rivalmix_alerts_total counter
rivalmix_alerts_total{category="cereal"} 1
# HELP rivalmix_surprise_mean Mean negative log predictive density, in nats, of the data the last refit of the category added or replaced.
# TYPE rivalmix_surprise_mean gauge
rivalmix_surprise_mean{category="cereal"} 1.25
# HELP rivalmix_refits_total Refits completed.
# TYPE rivalmix_refits_total counter
rivalmix_refits_total{category="cereal"} 2
# HELP rivalmix_replaces_total Product refits applied, by form: kept (each particle kept the product's segment) or redrawn (placed afresh).
# TYPE rivalmix_replaces_total counter
rivalmix_replaces_total{form="kept"} 1
rivalmix_replaces_total{form="redrawn"} 2
# HELP rivalmix_rejected_publish_failures_total Failed attempts to publish a rejected input message to the rejected stream (each is retried).
# TYPE rivalmix_rejected_publish_failures_total counter
rivalmix_rejected_publish_failures_total 2
# HELP rivalmix_outbox_pending Events committed to the outbox and not yet acknowledged by the output stream.
# TYPE rivalmix_outbox_pending gauge
rivalmix_outbox_pending 3
# HELP rivalmix_consumer_pending Input messages in the stream not yet delivered to the worker's consumer.
# TYPE rivalmix_consumer_pending gauge
rivalmix_consumer_pending 17
# HELP rivalmix_rejected_total Input messages filed on the rejected stream, by the class of rule broken (subject, message, field, model, other).
# TYPE rivalmix_rejected_total counter
rivalmix_rejected_total{reason="field"} 2
rivalmix_rejected_total{reason="message"} 0
rivalmix_rejected_total{reason="model"} 1
rivalmix_rejected_total{reason="other"} 0
rivalmix_rejected_total{reason="subject"} 0
# HELP rivalmix_active_alerts Products of the category with a missed-competitor alert in force after its last refit.
# TYPE rivalmix_active_alerts gauge
rivalmix_active_alerts{category="cereal"} 2
`
	if err := testutil.GatherAndCompare(reg, strings.NewReader(want),
		"rivalmix_messages_total", "rivalmix_ess_ratio", "rivalmix_segments", "rivalmix_segment_moves_total",
		"rivalmix_alerts_total", "rivalmix_surprise_mean", "rivalmix_refits_total",
		"rivalmix_replaces_total", "rivalmix_rejected_publish_failures_total", "rivalmix_outbox_pending", "rivalmix_consumer_pending",
		"rivalmix_rejected_total", "rivalmix_active_alerts"); err != nil {
		t.Error(err)
	}
	if n := testutil.CollectAndCount(m.update); n != 1 {
		t.Errorf("update histogram has %d series, want 1", n)
	}
	// 200 us is one observation in the histogram's sum, in seconds.
	mf, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, f := range mf {
		switch f.GetName() {
		case "rivalmix_update_seconds":
			h := f.GetMetric()[0].GetHistogram()
			if h.GetSampleCount() != 1 || math.Abs(h.GetSampleSum()-200e-6) > 1e-12 {
				t.Errorf("update histogram count %d sum %g, want 1 and 2e-4", h.GetSampleCount(), h.GetSampleSum())
			}
		case "rivalmix_refit_latency_seconds":
			// 1.5 s and a clamped 0; the smallest bucket (10 ms) holds the 0.
			h := f.GetMetric()[0].GetHistogram()
			if h.GetSampleCount() != 2 || math.Abs(h.GetSampleSum()-1.5) > 1e-12 || h.GetBucket()[0].GetCumulativeCount() != 1 {
				t.Errorf("refit summary histogram count %d sum %g first bucket %d, want 2, 1.5 and 1",
					h.GetSampleCount(), h.GetSampleSum(), h.GetBucket()[0].GetCumulativeCount())
			}
		}
	}
}

func TestMetricsNotGlobal(t *testing.T) {
	t.Parallel()
	NewMetrics(nil, nil, nil) // nothing registered anywhere
	NewMetrics(prometheus.NewRegistry(), nil, nil)
	mfs, err := prometheus.DefaultGatherer.Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, mf := range mfs {
		if strings.HasPrefix(mf.GetName(), "rivalmix_") {
			t.Errorf("%s is in the default registry", mf.GetName())
		}
	}
	// Two metric sets can live side by side in their own registries.
	a, b := prometheus.NewRegistry(), prometheus.NewRegistry()
	NewMetrics(a, func() float64 { return 0 }, nil)
	NewMetrics(b, func() float64 { return 0 }, nil)
}

func TestReasonOf(t *testing.T) {
	t.Parallel()
	_, subjErr := input.CategoryFromSubject("rivalmix.in.a.b", "rivalmix.in")
	_, msgErr := input.Decode([]byte("not json"), input.DecodeOptions{})
	for _, tt := range []struct {
		err  error
		want RejectReason
	}{
		{subjErr, RejectSubject},
		{msgErr, RejectMessage},
		{&input.InputError{Field: "relative[2]", Rule: "must be a finite number"}, RejectField},
		{fmt.Errorf("wrapped: %w", &input.InputError{Field: "cross[0].value", Rule: "required"}), RejectField},
		{fmt.Errorf("withdraw P-1: %w", category.ErrModel), RejectModel},
		{errors.New("something else"), RejectOther},
	} {
		if tt.err == nil {
			t.Fatalf("case %s: the input package accepted a message it must reject", tt.want)
		}
		if got := ReasonOf(tt.err); got != tt.want {
			t.Errorf("ReasonOf(%v) = %s, want %s", tt.err, got, tt.want)
		}
	}
}

func TestBuildInfo(t *testing.T) {
	t.Parallel()
	reg := prometheus.NewRegistry()
	reg.MustRegister(NewBuildInfo(BuildInfo{Version: "v1.2.3", GoVersion: "go1.26.0"}))
	want := `
# HELP rivalmix_build_info Always 1; the labels name the running build's module version, Go version and source revision.
# TYPE rivalmix_build_info gauge
rivalmix_build_info{goversion="go1.26.0",revision="unknown",version="v1.2.3"} 1
`
	if err := testutil.GatherAndCompare(reg, strings.NewReader(want)); err != nil {
		t.Error(err)
	}
	problems, err := testutil.GatherAndLint(reg)
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range problems {
		t.Errorf("lint: %s: %s", p.Metric, p.Text)
	}
}
