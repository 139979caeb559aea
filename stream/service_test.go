package stream

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"reflect"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"

	"rivalmix/alerts"
	"rivalmix/sequential/synth"
	"rivalmix/state"
	"rivalmix/stream/category"
	"rivalmix/stream/input"
	"rivalmix/stream/read"
)

// The service checks of this file and crash_test.go run the real thing:
// an embedded nats-server over TCP with JetStream on a temporary store,
// and bbolt state files in temporary directories. Every wait is bounded
// by a context or a deadline.

// testServiceConfig returns a small and fast service: 32 particles, two
// refit sweeps with the last one kept, a micro-batch of 16 changed
// products, fetches of 8 messages (so a refit spans many commits), no
// quiet period (refits end only by their refit-complete message, which
// keeps runs deterministic), and:
//   - AckWait 2 s with no BackOff, so that a delivery lost in a broker
//     restart or left unacked on purpose comes back within seconds;
//   - a 10-minute duplicate window, longer than any test here runs, so
//     that every republished event is recognised;
//   - payloads up to 2 KiB, so an oversized payload stays far below the
//     server's 1 MiB limit and reaches the worker.
func testServiceConfig() ServiceConfig {
	cfg := DefaultServiceConfig()
	cfg.Worker.Particles.Particles = 32
	cfg.Worker.Particles.BuildBurn = 20
	cfg.Worker.BatchSize = 16
	cfg.FetchSize = 8
	cfg.FetchWait = 50 * time.Millisecond
	cfg.QuietPeriod = 0
	cfg.Bus.AckWait = 2 * time.Second
	cfg.Bus.BackOff = nil
	cfg.Bus.MaxDeliver = -1
	cfg.Bus.DuplicateWindow = 10 * time.Minute
	cfg.Bus.MaxAckPending = 64
	cfg.Decode.MaxBytes = 2048
	return cfg
}

// withTag gives cfg its own consumer, output stream and rejected stream,
// all named after tag, on the shared input stream: runs with different
// tags read the same input (with the same stream timestamps) without
// seeing each other's events.
func withTag(cfg ServiceConfig, tag string) ServiceConfig {
	cfg.Bus.Durable = "worker-" + tag
	cfg.Bus.OutputStream = "OUT_" + tag
	cfg.Bus.OutputSubjects = tag + ".out.>"
	cfg.Bus.RejectedStream = "REJECTED_" + tag
	cfg.Bus.RejectedPrefix = tag + ".rejected"
	return cfg
}

// logBuffer collects log lines of goroutines that may outlive a test's
// body (publisher retries, NATS handlers) and shows them only when the
// test failed; t.Log itself must not be called after a test ends.
type logBuffer struct {
	mu   sync.Mutex
	buf  bytes.Buffer
	done bool
}

func newTestLog(t testing.TB) *slog.Logger {
	t.Helper()
	lb := &logBuffer{}
	t.Cleanup(func() {
		lb.mu.Lock()
		defer lb.mu.Unlock()
		lb.done = true
		if t.Failed() {
			out := lb.buf.String()
			if len(out) > 64<<10 {
				out = "...\n" + out[len(out)-64<<10:]
			}
			t.Logf("service log:\n%s", out)
		}
	})
	return slog.New(slog.NewTextHandler(lb, &slog.HandlerOptions{Level: slog.LevelInfo}))
}

func (l *logBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if !l.done {
		l.buf.Write(p)
	}
	return len(p), nil
}

// errTestCrash is what a failpoint returns to make the service stop dead.
var errTestCrash = errors.New("test: simulated crash")

// instanceOptions adjust startInstance.
type instanceOptions struct {
	// failpoint is installed as the service's failpoint.
	failpoint func(stage string) error
	// publisher, when set, wraps the publisher's JetStream.
	publisher func(MsgPublisher) MsgPublisher
	// noRun builds everything but starts neither Run nor the publisher.
	noRun bool
	// manual builds everything and leaves the start to the caller.
	manual bool
}

// instance is one worker process in miniature: its own NATS connection,
// state file handle, metrics, views, outbox publisher and service.
type instance struct {
	t     testing.TB
	store *state.Store
	nc    *nats.Conn
	js    jetstream.JetStream
	reg   *prometheus.Registry
	views *read.Views
	pub   *Publisher
	svc   *Service

	runCtx  context.Context // the context of Run and the publisher's Run
	cancel  context.CancelFunc
	runErr  chan error    // Run's result
	pubDone chan struct{} // closed when the publisher's Run returned
	once    sync.Once
}

// startInstance opens the state file at path, connects to url and starts
// the service and the publisher (unless opt.noRun or opt.manual). The
// instance is abandoned at the end of the test if it is still running.
func startInstance(t testing.TB, url, path string, cfg ServiceConfig, lg *slog.Logger, opt instanceOptions) *instance {
	t.Helper()
	in := &instance{t: t, runErr: make(chan error, 1), pubDone: make(chan struct{})}
	var err error
	if in.store, err = state.Open(path, state.Options{Timeout: 5 * time.Second}); err != nil {
		t.Fatalf("state.Open %s: %v", path, err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if in.nc, err = Connect(ctx, url, ConnectOptions{Name: "rivalmix-test-worker", ReconnectWait: 50 * time.Millisecond}, lg); err != nil {
		_ = in.store.Close()
		t.Fatalf("Connect: %v", err)
	}
	t.Cleanup(in.abandon)
	if in.js, err = jetstream.New(in.nc); err != nil {
		t.Fatalf("jetstream.New: %v", err)
	}
	in.reg = prometheus.NewRegistry()
	metrics := NewMetrics(in.reg,
		func() float64 {
			n, err := in.store.OutboxLen()
			if err != nil {
				return -1
			}
			return float64(n)
		},
		func() float64 {
			c, err := in.js.Consumer(context.Background(), cfg.Bus.InputStream, cfg.Bus.Durable)
			if err != nil {
				return -1
			}
			info := c.CachedInfo()
			return float64(info.NumPending + uint64(info.NumAckPending))
		})
	in.views = read.NewViews()
	var pjs MsgPublisher = in.js
	if opt.publisher != nil {
		pjs = opt.publisher(pjs)
	}
	pcfg := PublisherConfig{Batch: 16, MinBackoff: 20 * time.Millisecond, MaxBackoff: 500 * time.Millisecond,
		Poll: 100 * time.Millisecond, Stream: cfg.Bus.OutputStream}
	if in.pub, err = NewPublisher(in.store, pjs, pcfg, lg); err != nil {
		t.Fatalf("NewPublisher: %v", err)
	}
	if in.svc, err = NewService(lg, in.js, in.store, metrics, in.views, in.pub, cfg); err != nil {
		t.Fatalf("NewService: %v", err)
	}
	in.svc.failpoint = opt.failpoint
	runCtx, runCancel := context.WithCancel(context.Background())
	in.cancel = runCancel
	in.runCtx = runCtx
	switch {
	case opt.noRun:
		in.runErr <- nil
		close(in.pubDone)
	case !opt.manual:
		in.start()
	}
	return in
}

// start runs the service and the publisher; startInstance calls it
// unless noRun or manual is set.
func (in *instance) start() {
	go func() { in.runErr <- in.svc.Run(in.runCtx) }()
	go func() {
		defer close(in.pubDone)
		_ = in.pub.Run(in.runCtx)
	}()
}

// abandon stops the instance the way a dying process does: nothing more
// is committed, acked or published; the connection is closed without a
// drain and the state file released. Safe to call more than once.
func (in *instance) abandon() {
	in.once.Do(func() {
		in.cancel()
		in.nc.Close()
		in.waitGoroutines()
		if err := in.store.Close(); err != nil {
			in.t.Errorf("store.Close: %v", err)
		}
	})
}

func (in *instance) waitGoroutines() {
	timer := time.NewTimer(30 * time.Second)
	defer timer.Stop()
	select {
	case err := <-in.runErr:
		in.runErr <- err // keep it for stop
	case <-timer.C:
		in.t.Errorf("service Run did not return within 30 s")
	}
	select {
	case <-in.pubDone:
	case <-timer.C:
		in.t.Errorf("publisher Run did not return within 30 s")
	}
}

// stop shuts the instance down gracefully, as serve does on SIGTERM:
// cancel Run (which finishes the fetch in hand), flush the outbox once
// more, drain the connection, close the state file. It returns Run's
// error.
func (in *instance) stop() error {
	var runErr error
	in.once.Do(func() {
		in.cancel()
		in.waitGoroutines()
		runErr = <-in.runErr
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		if _, err := in.pub.Flush(ctx); err != nil {
			in.t.Errorf("final outbox flush: %v", err)
		}
		if err := in.nc.Drain(); err != nil {
			in.t.Errorf("drain: %v", err)
		}
		for i := 0; i < 250 && !in.nc.IsClosed(); i++ {
			time.Sleep(20 * time.Millisecond)
		}
		in.nc.Close()
		if err := in.store.Close(); err != nil {
			in.t.Errorf("store.Close: %v", err)
		}
	})
	return runErr
}

// position returns the committed input position of the running instance.
func (in *instance) position() uint64 {
	pos, _, err := in.store.Position()
	if err != nil {
		in.t.Errorf("Position: %v", err)
	}
	return pos.StreamSeq
}

// waitDone waits until the instance has committed every input message
// up to last and published its whole outbox, until Run returns, or until
// crashed (which may be nil) is closed. It returns Run's error when Run
// returned, and stopped = true then and on a crash.
func (in *instance) waitDone(ctx context.Context, last uint64, crashed <-chan struct{}) (stopped bool, err error) {
	in.t.Helper()
	tick := time.NewTicker(10 * time.Millisecond)
	defer tick.Stop()
	for {
		select {
		case err := <-in.runErr:
			in.runErr <- err
			return true, err
		case <-crashed:
			return true, errTestCrash
		case <-ctx.Done():
			in.t.Fatalf("service did not reach input position %d (at %d): %v", last, in.position(), ctx.Err())
		case <-tick.C:
		}
		if in.svc.Ready() != nil || in.position() < last {
			continue
		}
		n, err := in.store.OutboxLen()
		if err != nil {
			in.t.Fatalf("OutboxLen: %v", err)
		}
		if n == 0 {
			return false, nil
		}
	}
}

// testCategory is one simulated category: products drawn by synth, and
// the refits to send.
type testCategory struct {
	name string
	seq  *synth.Sequence
	n    int
	// refits is how many refits the sequence plans; refitName(refits-1)
	// is the last one a finished run has applied.
	refits int
}

// newTestCategory draws a fictional category (synth's invented retailer)
// of n products with first id firstID, over two refits.
func newTestCategory(name string, n, firstID int, seed uint64) *testCategory {
	return newTestCategoryRefits(name, n, firstID, seed, 2)
}

// newTestCategoryRefits is newTestCategory over the given number of
// refits (at least 2); the planted segment switches happen at refit
// refits/2.
func newTestCategoryRefits(name string, n, firstID int, seed uint64, refits int) *testCategory {
	if refits < 2 {
		panic("stream: newTestCategoryRefits wants at least 2 refits")
	}
	cfg := synth.Scenario()
	cfg.Category = name
	cfg.Products = n
	cfg.FirstID = firstID
	src := rand.New(rand.NewPCG(seed, 0x5eed))
	return &testCategory{name: name, seq: synth.NewSequence(cfg, refits, 0.25, src), n: n, refits: refits}
}

// lastRefit is the name of the category's last planned refit.
func (c *testCategory) lastRefit() string { return refitName(c.refits - 1) }

// refitName is the name of refit r (0-based).
func refitName(r int) string { return fmt.Sprintf("2026-W%02d", 40+r) }

// inputMsg is one message to publish on the input stream.
type inputMsg struct {
	subject string
	data    []byte
}

// refitMessages returns refit r of every category, products interleaved
// across categories, each category's refit-complete message after its
// last product.
func refitMessages(r int, cats ...*testCategory) []inputMsg {
	var per [][]inputMsg
	for _, c := range cats {
		subj := input.DefaultInputPrefix + "." + c.name
		var ms []inputMsg
		for _, p := range c.seq.Refit(r) {
			ms = append(ms, inputMsg{subject: subj, data: p.MessageJSON(refitName(r))})
		}
		ms = append(ms, inputMsg{subject: subj,
			data: fmt.Appendf(nil, `{"refit":%q,"complete":true,"expected":%d}`, refitName(r), c.n)})
		per = append(per, ms)
	}
	var out []inputMsg
	for i := 0; ; i++ {
		more := false
		for _, ms := range per {
			if i < len(ms) {
				out = append(out, ms[i])
				more = true
			}
		}
		if !more {
			return out
		}
	}
}

// publishInput publishes msgs in order on one connection and waits for
// every acknowledgement; it returns the stream sequence of the last one.
func publishInput(t testing.TB, ctx context.Context, js jetstream.JetStream, msgs []inputMsg) uint64 {
	t.Helper()
	futures := make([]jetstream.PubAckFuture, 0, len(msgs))
	for _, m := range msgs {
		f, err := js.PublishMsgAsync(&nats.Msg{Subject: m.subject, Data: m.data})
		if err != nil {
			t.Fatalf("publish to %s: %v", m.subject, err)
		}
		futures = append(futures, f)
	}
	select {
	case <-js.PublishAsyncComplete():
	case <-ctx.Done():
		t.Fatalf("input publishes not acknowledged: %v", ctx.Err())
	}
	var last uint64
	for i, f := range futures {
		select {
		case ack := <-f.Ok():
			last = max(last, ack.Sequence)
		case err := <-f.Err():
			t.Fatalf("publish %d to %s: %v", i, msgs[i].subject, err)
		}
	}
	return last
}

// streamMessages returns every message stored in the named stream, in
// order.
func streamMessages(t testing.TB, ctx context.Context, js jetstream.JetStream, name string) []*jetstream.RawStreamMsg {
	t.Helper()
	s, err := js.Stream(ctx, name)
	if err != nil {
		t.Fatalf("stream %s: %v", name, err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		t.Fatalf("stream %s info: %v", name, err)
	}
	var out []*jetstream.RawStreamMsg
	if info.State.Msgs == 0 {
		return nil
	}
	for seq := info.State.FirstSeq; seq <= info.State.LastSeq; seq++ {
		m, err := s.GetMsg(ctx, seq)
		if errors.Is(err, jetstream.ErrMsgNotFound) {
			continue
		}
		if err != nil {
			t.Fatalf("stream %s message %d: %v", name, seq, err)
		}
		out = append(out, m)
	}
	return out
}

// cloudEvent is what the checks read from an output message.
type cloudEvent struct {
	ID      string          `json:"id"`
	Type    string          `json:"type"`
	Subject string          `json:"subject"`
	Data    json.RawMessage `json:"data"`
}

// outputEvents reads the output stream: the events by id, and how often
// each id is stored. It checks that the Nats-Msg-Id of every message is
// its CloudEvent id.
func outputEvents(t testing.TB, ctx context.Context, js jetstream.JetStream, streamName string) (byID map[string]*jetstream.RawStreamMsg, count map[string]int) {
	t.Helper()
	byID, count = map[string]*jetstream.RawStreamMsg{}, map[string]int{}
	for _, m := range streamMessages(t, ctx, js, streamName) {
		var ce cloudEvent
		if err := json.Unmarshal(m.Data, &ce); err != nil {
			t.Fatalf("output message %d on %s is not a CloudEvent: %v", m.Sequence, m.Subject, err)
		}
		if id := m.Header.Get(nats.MsgIdHdr); id != ce.ID {
			t.Errorf("output message %d: Nats-Msg-Id %q, CloudEvent id %q", m.Sequence, id, ce.ID)
		}
		byID[ce.ID] = m
		count[ce.ID]++
	}
	return byID, count
}

// kindCounts counts output messages by the last token of their subject
// (the event kind) and by the refit in their body.
func kindCounts(t testing.TB, msgs map[string]*jetstream.RawStreamMsg) map[string]int {
	t.Helper()
	out := map[string]int{}
	for _, m := range msgs {
		var ce struct {
			Data struct {
				Refit string `json:"refit"`
			} `json:"data"`
		}
		if err := json.Unmarshal(m.Data, &ce); err != nil {
			t.Fatalf("event %s: %v", m.Subject, err)
		}
		kind := m.Subject[strings.LastIndexByte(m.Subject, '.')+1:]
		out[kind]++
		out[kind+"@"+ce.Data.Refit]++
	}
	return out
}

// consumerInfo returns the durable consumer's state.
func consumerInfo(t testing.TB, ctx context.Context, js jetstream.JetStream, bus BusConfig) *jetstream.ConsumerInfo {
	t.Helper()
	c, err := js.Consumer(ctx, bus.InputStream, bus.Durable)
	if err != nil {
		t.Fatalf("consumer %s: %v", bus.Durable, err)
	}
	info, err := c.Info(ctx)
	if err != nil {
		t.Fatalf("consumer %s info: %v", bus.Durable, err)
	}
	return info
}

// readState opens the state file read-only and returns every category's
// encoded particle system and product records.
func readState(t testing.TB, path string) (snaps map[string][]byte, recs map[string][]state.ProductRecord) {
	t.Helper()
	st, err := state.Open(path, state.Options{ReadOnly: true, Timeout: 5 * time.Second})
	if err != nil {
		t.Fatalf("state.Open %s: %v", path, err)
	}
	defer st.Close()
	cats, err := st.Categories()
	if err != nil {
		t.Fatalf("Categories: %v", err)
	}
	snaps, recs = map[string][]byte{}, map[string][]state.ProductRecord{}
	for _, c := range cats {
		if snaps[c], err = st.Snapshot(c); err != nil {
			t.Fatalf("Snapshot %s: %v", c, err)
		}
		if recs[c], err = st.Products(c); err != nil {
			t.Fatalf("Products %s: %v", c, err)
		}
	}
	if n, err := st.OutboxLen(); err != nil || n != 0 {
		t.Errorf("outbox of %s holds %d events (err %v), want 0", filepath.Base(path), n, err)
	}
	return snaps, recs
}

// checkLastRefit checks that every product of every category has its
// last refit applied.
func checkLastRefit(t testing.TB, recs map[string][]state.ProductRecord, refit string, cats ...*testCategory) {
	t.Helper()
	for _, c := range cats {
		rs := recs[c.name]
		if len(rs) != c.n {
			t.Errorf("category %s has %d product records, want %d", c.name, len(rs), c.n)
		}
		for _, r := range rs {
			if r.Refit != refit || r.Withdrawn {
				t.Errorf("category %s product %s: refit %q withdrawn %v, want refit %q applied", c.name, r.Product, r.Refit, r.Withdrawn, refit)
			}
		}
	}
}

// ensureStreams creates cfg's streams and consumer.
func ensureStreams(t testing.TB, ctx context.Context, js jetstream.JetStream, cfg ServiceConfig) {
	t.Helper()
	if err := EnsureStreams(ctx, js, cfg.Bus); err != nil {
		t.Fatalf("EnsureStreams: %v", err)
	}
}

// TestServiceEndToEnd publishes two refits of two simulated categories,
// runs the service and the outbox publisher, and checks the events on
// the output stream, the read API over HTTP and the metrics.
func TestServiceEndToEnd(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	e, js, cfg := newTestBus(t, ctx)
	cereal := newTestCategory("breakfast-cereal", 48, 1001, 11)
	tea := newTestCategory("tea", 24, 3001, 12)
	// Cereal's refits always redraw and tea's keep assignments when the
	// weights allow, so that both forms of a refit reach the metrics.
	cfg.Worker.Particles.KeepESS = 0
	teaCfg := cfg.Worker
	teaCfg.Particles.KeepESS = 0.5
	cfg.PerCategory = map[string]category.WorkerConfig{tea.name: teaCfg}
	publishInput(t, ctx, js, refitMessages(0, cereal, tea))
	last := publishInput(t, ctx, js, refitMessages(1, cereal, tea))

	in := startInstance(t, e.ClientURL(), filepath.Join(t.TempDir(), "state.db"), cfg, newTestLog(t), instanceOptions{})
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("service stopped: %v", err)
	}

	// Events: per category a summary per refit; births only at the first
	// refit, one per segment its summary counts; moves as the summaries
	// count them.
	msgs, count := outputEvents(t, ctx, js, cfg.Bus.OutputStream)
	for id, n := range count {
		if n != 1 {
			t.Errorf("event %s stored %d times", id, n)
		}
	}
	for _, c := range []*testCategory{cereal, tea} {
		got := map[string]int{}
		summaries := map[string]alerts.RefitSummary{}
		for _, m := range msgs {
			if !strings.HasPrefix(m.Subject, cfg.Bus.OutputPrefix()+"."+c.name+".") {
				continue
			}
			kind := m.Subject[strings.LastIndexByte(m.Subject, '.')+1:]
			var ce struct {
				Type string `json:"type"`
				Data struct {
					Refit string `json:"refit"`
				} `json:"data"`
			}
			if err := json.Unmarshal(m.Data, &ce); err != nil {
				t.Fatal(err)
			}
			got[kind+"@"+ce.Data.Refit]++
			if kind == string(alerts.KindSummary) {
				var s struct {
					Data alerts.RefitSummary `json:"data"`
				}
				if err := json.Unmarshal(m.Data, &s); err != nil {
					t.Fatal(err)
				}
				summaries[ce.Data.Refit] = s.Data
			}
			if m.Header.Get(HeaderContentType) != alerts.CloudEventContentType {
				t.Errorf("event on %s: content-type %q", m.Subject, m.Header.Get(HeaderContentType))
			}
			if want := alerts.Kind(kind).Type(alerts.DefaultTypePrefix); ce.Type != want {
				t.Errorf("event on %s has type %q, want %q", m.Subject, ce.Type, want)
			}
		}
		r0, r1 := refitName(0), refitName(1)
		if got["summary@"+r0] != 1 || got["summary@"+r1] != 1 {
			t.Errorf("%s: summaries per refit %d and %d, want 1 and 1 (all: %v)", c.name, got["summary@"+r0], got["summary@"+r1], got)
		}
		s0, s1 := summaries[r0], summaries[r1]
		if s0.Segments < 1 || got["born@"+r0] != s0.Segments || s0.Births != s0.Segments {
			t.Errorf("%s refit 1: %d born events, summary says %d births and %d segments; want one birth per segment",
				c.name, got["born@"+r0], s0.Births, s0.Segments)
		}
		if got["born@"+r1] != s1.Births || got["moved@"+r1] != s1.Moves || got["moved@"+r0] != 0 {
			t.Errorf("%s refit 2: %d born and %d moved events, summary says %d births and %d moves",
				c.name, got["born@"+r1], got["moved@"+r1], s1.Births, s1.Moves)
		}
		if s0.Products != c.n || s1.Products != c.n {
			t.Errorf("%s: summaries count %d and %d products, want %d", c.name, s0.Products, s1.Products, c.n)
		}
		if got := testutil.ToFloat64(in.svc.metrics.active.WithLabelValues(c.name)); int(got) != s1.ActiveAlerts {
			t.Errorf("%s: rivalmix_active_alerts = %v, the last summary says %d active", c.name, got, s1.ActiveAlerts)
		}
	}
	recs := map[string][]state.ProductRecord{}
	for _, c := range []*testCategory{cereal, tea} {
		_, recs[c.name] = snapshotOf(t, in.store, c.name)
	}
	checkLastRefit(t, recs, refitName(1), cereal, tea)
	t.Logf("%d events on %s: %v", len(msgs), cfg.Bus.OutputStream, kindCounts(t, msgs))

	// The read API over a real HTTP server.
	hs := httptest.NewServer(read.NewHTTPHandler(in.views, in.reg, in.svc.Ready, newTestLog(t)))
	t.Cleanup(hs.Close)
	get := func(path string) (int, string) {
		t.Helper()
		req, err := http.NewRequestWithContext(ctx, http.MethodGet, hs.URL+path, nil)
		if err != nil {
			t.Fatal(err)
		}
		resp, err := hs.Client().Do(req)
		if err != nil {
			t.Fatalf("GET %s: %v", path, err)
		}
		defer resp.Body.Close()
		b, err := io.ReadAll(resp.Body)
		if err != nil {
			t.Fatalf("GET %s: %v", path, err)
		}
		return resp.StatusCode, string(b)
	}
	for _, tt := range []struct {
		path string
		code int
		want []string
	}{
		{"/healthz", 200, []string{"ok"}},
		{"/readyz", 200, []string{"ok"}},
		{"/v1/categories", 200, []string{`"breakfast-cereal"`, `"tea"`, `"` + refitName(1) + `"`}},
		{"/v1/categories/breakfast-cereal/segments", 200, []string{`"category":"breakfast-cereal"`, `"members"`}},
		{"/v1/categories/tea/products/P-3001", 200, []string{`"product":"P-3001"`, `"segment"`}},
		{"/v1/categories/tea/products/P-1001", 404, []string{`"error"`}},
		{"/v1/categories/coffee/segments", 404, []string{`"error"`}},
	} {
		code, body := get(tt.path)
		if code != tt.code {
			t.Errorf("GET %s: status %d, want %d; body %s", tt.path, code, tt.code, body)
			continue
		}
		for _, w := range tt.want {
			if !strings.Contains(body, w) {
				t.Errorf("GET %s: body lacks %s: %s", tt.path, w, body)
			}
		}
	}
	var segs read.SegmentsResponse
	if code, body := get("/v1/categories/breakfast-cereal/segments"); code == 200 {
		if err := json.Unmarshal([]byte(body), &segs); err != nil {
			t.Fatalf("segments response: %v", err)
		}
		members := 0
		for _, s := range segs.Segments {
			members += len(s.Members)
		}
		if members != cereal.n {
			t.Errorf("segments list %d members, want %d products", members, cereal.n)
		}
	}

	// Metrics: lint-clean, and the counts of what happened.
	code, body := get("/metrics")
	if code != 200 || !strings.Contains(body, "rivalmix_messages_total") {
		t.Errorf("GET /metrics: status %d, body lacks rivalmix_messages_total", code)
	}
	problems, err := testutil.CollectAndLint(in.reg)
	if err != nil {
		t.Fatalf("CollectAndLint: %v", err)
	}
	for _, p := range problems {
		t.Errorf("metric %s: %s", p.Metric, p.Text)
	}
	// One refit-to-summary latency per completed refit.
	if n := histogramCount(t, in.reg, "rivalmix_refit_latency_seconds"); n != 4 {
		t.Errorf("rivalmix_refit_latency_seconds counts %d refits, want 4 (2 categories x 2 refits)", n)
	}
	wantApplied := 2 * (cereal.n + tea.n + 2)
	if got := testutil.ToFloat64(in.svc.metrics.messages.WithLabelValues(string(OutcomeApplied))); int(got) != wantApplied {
		t.Errorf("rivalmix_messages_total{outcome=applied} = %v, want %d", got, wantApplied)
	}
	for _, c := range []string{cereal.name, tea.name} {
		if got := testutil.ToFloat64(in.svc.metrics.refits.WithLabelValues(c)); got != 2 {
			t.Errorf("rivalmix_refits_total{category=%s} = %v, want 2", c, got)
		}
	}
	// The second refit replaces every product: cereal's all redraw, and
	// tea's keep at least once.
	kept := testutil.ToFloat64(in.svc.metrics.replaces.WithLabelValues("kept"))
	redrawn := testutil.ToFloat64(in.svc.metrics.replaces.WithLabelValues("redrawn"))
	if int(kept+redrawn) != cereal.n+tea.n || kept < 1 || int(redrawn) < cereal.n {
		t.Errorf("rivalmix_replaces_total: kept %v, redrawn %v; want %d in all, at least %d redrawn (cereal) and 1 kept (tea)",
			kept, redrawn, cereal.n+tea.n, cereal.n)
	}
	if err := in.stop(); err != nil {
		t.Errorf("Run: %v", err)
	}
}

// snapshotOf returns a category's stored particle system and records.
func snapshotOf(t testing.TB, st *state.Store, cat string) ([]byte, []state.ProductRecord) {
	t.Helper()
	snap, err := st.Snapshot(cat)
	if err != nil {
		t.Fatalf("Snapshot %s: %v", cat, err)
	}
	recs, err := st.Products(cat)
	if err != nil {
		t.Fatalf("Products %s: %v", cat, err)
	}
	return snap, recs
}

// TestServiceRedelivery checks rule 3 and the duplicate windows:
//   - a real redelivery: the worker dies after a commit and before any
//     ack; the broker delivers the fetch again (NumDelivered 2) to the
//     restarted worker, which acks it without effect;
//   - the identical payload published again as a new message, for a
//     product and for a refit-complete, changes nothing;
//   - a second publish with the same Nats-Msg-Id is dropped by the input
//     stream, and an event published again by the output stream.
func TestServiceRedelivery(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	e, js, cfg := newTestBus(t, ctx)
	cereal := newTestCategory("breakfast-cereal", 32, 1001, 41)
	input := refitMessages(0, cereal)
	last := publishInput(t, ctx, js, input)
	path := filepath.Join(t.TempDir(), "state.db")
	lg := newTestLog(t)

	// Die right after the first commit, before any ack.
	plan := &crashPlan{stage: "committed", at: 1, seen: map[string]int{}, dead: make(chan struct{})}
	in := startInstance(t, e.ClientURL(), path, cfg, lg, plan.options(new(atomic.Int64)))
	if stopped, err := in.waitDone(ctx, last, plan.dead); !stopped || !plan.hasFired() {
		t.Fatalf("worker did not die at the first commit (err %v)", err)
	}
	in.abandon()

	// The restarted worker, fed by hand with what the broker redelivers
	// to the consumer the dead worker left (Run would re-create it from
	// the committed position, so nothing would come back).
	in = startInstance(t, e.ClientURL(), path, cfg, lg, instanceOptions{noRun: true})
	pos := in.position()
	if pos == 0 {
		t.Fatal("nothing committed before the crash")
	}
	snap0, recs0 := snapshotOf(t, in.store, cereal.name)
	cons, err := js.Consumer(ctx, cfg.Bus.InputStream, cfg.Bus.Durable)
	if err != nil {
		t.Fatalf("consumer: %v", err)
	}
	// Let the ack wait of the unacked deliveries run out, with a margin
	// for the server's redelivery timer, so that the next pull gets them
	// back rather than new messages.
	time.Sleep(cfg.Bus.AckWait + 1500*time.Millisecond)
	batch, err := cons.Fetch(cfg.FetchSize, jetstream.FetchMaxWait(5*time.Second))
	if err != nil {
		t.Fatalf("Fetch: %v", err)
	}
	var msgs []jetstream.Msg
	for m := range batch.Messages() {
		md, err := m.Metadata()
		if err != nil {
			t.Fatal(err)
		}
		if md.NumDelivered < 2 || md.Sequence.Stream > pos {
			t.Errorf("fetched input %d delivered %d times; want a redelivery of a committed message (position %d)",
				md.Sequence.Stream, md.NumDelivered, pos)
		}
		msgs = append(msgs, m)
	}
	if uint64(len(msgs)) != pos {
		t.Fatalf("broker redelivered %d messages, want the %d of the crashed fetch", len(msgs), pos)
	}
	if err := in.svc.process(ctx, msgs, time.Now()); err != nil {
		t.Fatalf("process redelivered fetch: %v", err)
	}
	snap1, recs1 := snapshotOf(t, in.store, cereal.name)
	if !bytes.Equal(snap0, snap1) || !reflect.DeepEqual(recs0, recs1) || in.position() != pos {
		t.Errorf("redelivered fetch changed the state (snapshot equal %v, records equal %v, position %d -> %d)",
			bytes.Equal(snap0, snap1), reflect.DeepEqual(recs0, recs1), pos, in.position())
	}
	if got := testutil.ToFloat64(in.svc.metrics.messages.WithLabelValues(string(OutcomeDuplicate))); int(got) != len(msgs) {
		t.Errorf("duplicates counted %v, want %d", got, len(msgs))
	}
	if info := consumerInfo(t, ctx, js, cfg.Bus); info.NumAckPending != 0 || info.AckFloor.Stream != pos {
		t.Errorf("after the redelivered fetch: %d unacked, ack floor %d; want 0 and %d", info.NumAckPending, info.AckFloor.Stream, pos)
	}
	in.abandon()

	// Finish the refit, then send a product's payload and the
	// refit-complete again as new messages.
	in = startInstance(t, e.ClientURL(), path, cfg, lg, instanceOptions{})
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("service stopped: %v", err)
	}
	snap2, recs2 := snapshotOf(t, in.store, cereal.name)
	_, events2 := outputEvents(t, ctx, js, cfg.Bus.OutputStream)
	again := []inputMsg{input[3], input[len(input)-1]}
	if !bytes.Contains(again[1].data, []byte(`"complete":true`)) {
		t.Fatalf("last input is not the refit-complete message: %s", again[1].data)
	}
	lastAgain := publishInput(t, ctx, js, again)
	if stopped, err := in.waitDone(ctx, lastAgain, nil); stopped {
		t.Fatalf("service stopped: %v", err)
	}
	snap3, recs3 := snapshotOf(t, in.store, cereal.name)
	if !bytes.Equal(snap2, snap3) {
		t.Error("a payload applied before, sent again as a new message, changed the particle system")
	}
	if !reflect.DeepEqual(recs2, recs3) {
		t.Error("a payload applied before, sent again as a new message, changed the product records")
	}
	// The counter moves after the acks, which follow the commit that
	// waitDone saw: give it a moment.
	dupCount := func() float64 {
		return testutil.ToFloat64(in.svc.metrics.messages.WithLabelValues(string(OutcomeDuplicate)))
	}
	for deadline := time.Now().Add(5 * time.Second); dupCount() < 2 && time.Now().Before(deadline); {
		time.Sleep(20 * time.Millisecond)
	}
	if got := dupCount(); got != 2 {
		t.Errorf("duplicates counted %v, want the 2 repeated messages", got)
	}
	if _, events3 := outputEvents(t, ctx, js, cfg.Bus.OutputStream); !reflect.DeepEqual(events2, events3) {
		t.Errorf("repeated messages changed the output stream: %d events before, %d after", len(events2), len(events3))
	}

	// Same Nats-Msg-Id twice: the input stream keeps one.
	dup := inputMsg{subject: input[5].subject, data: input[5].data}
	for i := range 2 {
		ack, err := js.PublishMsg(ctx, &nats.Msg{Subject: dup.subject, Data: dup.data}, jetstream.WithMsgID("refit-W40-P-1006"))
		if err != nil {
			t.Fatalf("publish with Nats-Msg-Id: %v", err)
		}
		if ack.Duplicate != (i == 1) {
			t.Errorf("input publish %d with the same Nats-Msg-Id: Duplicate = %v", i+1, ack.Duplicate)
		}
	}
	// An event published again, as the outbox publisher does after a
	// crash between the publish and the delete: the output stream keeps
	// one.
	outMsgs, _ := outputEvents(t, ctx, js, cfg.Bus.OutputStream)
	before := len(streamMessages(t, ctx, js, cfg.Bus.OutputStream))
	for id, m := range outMsgs {
		ack, err := js.PublishMsg(ctx, &nats.Msg{Subject: m.Subject, Data: m.Data, Header: m.Header}, jetstream.WithMsgID(id))
		if err != nil {
			t.Fatalf("republish event %s: %v", id, err)
		}
		if !ack.Duplicate {
			t.Errorf("event %s published again was stored again", id)
		}
	}
	if after := len(streamMessages(t, ctx, js, cfg.Bus.OutputStream)); after != before {
		t.Errorf("output stream holds %d messages after republishing, want %d", after, before)
	}
	if err := in.stop(); err != nil {
		t.Errorf("Run: %v", err)
	}
}

// TestServiceBadInput sends a message breaking each input rule; each
// lands on the rejected stream with its payload and a reason naming the
// field (or the message, when the whole payload is at fault), the input
// is terminated, and the valid messages around them are applied.
func TestServiceBadInput(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	e, js, cfg := newTestBus(t, ctx)
	const cat = "breakfast-cereal"
	subj := input.DefaultInputPrefix + "." + cat
	oversized := `{"product":"P-2001","refit":"2026-W40","competitors":10,"relative":[0.5]}` + strings.Repeat(" ", cfg.Decode.MaxBytes)
	cases := []struct {
		name, subject, payload string
		reason                 string // what the reason must contain
	}{
		{"unknown field", subj, `{"product":"P-2001","refit":"2026-W40","competitors":10,"relative":[0.5],"colour":"red"}`, `field "colour": unknown field`},
		{"wrong type", subj, `{"product":"P-2001","refit":"2026-W40","competitors":"ten","relative":[0.5]}`, `field "competitors": must be a number`},
		{"overflow to infinity", subj, `{"product":"P-2001","refit":"2026-W40","competitors":10,"relative":[0.5,1e400]}`, `field "relative[1]": must be a finite number`},
		{"n > L", subj, `{"product":"P-2001","refit":"2026-W40","competitors":2,"relative":[0.5,0.4,0.3]}`, `field "relative": more entries (3) than competitors`},
		{"oversized", subj, oversized, "message: payload of"},
		{"own elasticity positive", subj, `{"product":"P-2001","refit":"2026-W40","own":0.5,"cross":[{"id":"P-2002","value":1.2}]}`, `field "own": must be negative`},
		{"own elasticity zero", subj, `{"product":"P-2001","refit":"2026-W40","own":0,"cross":[{"id":"P-2002","value":1.2}]}`, `field "own": must be negative`},
		{"not JSON", subj, `{"product":"P-2001","refit":`, "message: not valid JSON"},
		{"no category in the subject", input.DefaultInputPrefix + ".breakfast.cereal",
			`{"product":"P-2001","refit":"2026-W40","competitors":10,"relative":[0.5]}`, `field "subject"`},
		// The bare prefix: the input stream takes it, so the message is
		// kept and rejected with its reason instead of refused at publish.
		{"bare input subject", input.DefaultInputPrefix,
			`{"product":"P-2001","refit":"2026-W40","competitors":10,"relative":[0.5]}`,
			`field "subject": "rivalmix.in" names no category; publish each category's messages to rivalmix.in.<category>`},
	}
	valid := func(id string) inputMsg {
		return inputMsg{subject: subj, data: fmt.Appendf(nil, `{"product":%q,"refit":"2026-W40","competitors":10,"relative":[0.8,0.3]}`, id)}
	}
	msgs := []inputMsg{valid("P-2001")}
	for _, c := range cases {
		msgs = append(msgs, inputMsg{subject: c.subject, data: []byte(c.payload)})
	}
	msgs = append(msgs, valid("P-2002"), valid("P-2003"),
		inputMsg{subject: subj, data: []byte(`{"refit":"2026-W40","complete":true,"expected":3}`)})
	last := publishInput(t, ctx, js, msgs)
	first := last - uint64(len(msgs)) + 1

	in := startInstance(t, e.ClientURL(), filepath.Join(t.TempDir(), "state.db"), cfg, newTestLog(t), instanceOptions{})
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("service stopped: %v", err)
	}
	rejected := map[uint64]*jetstream.RawStreamMsg{}
	for _, m := range streamMessages(t, ctx, js, cfg.Bus.RejectedStream) {
		seq, err := strconv.ParseUint(m.Header.Get(HeaderInputSeq), 10, 64)
		if err != nil {
			t.Errorf("rejected message %d: %s header %q: %v", m.Sequence, HeaderInputSeq, m.Header.Get(HeaderInputSeq), err)
		}
		rejected[seq] = m
	}
	if len(rejected) != len(cases) {
		t.Errorf("rejected stream holds %d messages, want %d", len(rejected), len(cases))
	}
	for i, c := range cases {
		seq := first + 1 + uint64(i)
		m, ok := rejected[seq]
		if !ok {
			t.Errorf("%s: input %d not on the rejected stream", c.name, seq)
			continue
		}
		wantSubj := cfg.Bus.RejectedPrefix + "." + cat
		if c.subject != subj {
			wantSubj = cfg.Bus.RejectedPrefix + "." + UnknownCategory
		}
		reason := m.Header.Get(HeaderReason)
		switch {
		case m.Subject != wantSubj:
			t.Errorf("%s: rejected on %s, want %s", c.name, m.Subject, wantSubj)
		case !strings.Contains(reason, c.reason):
			t.Errorf("%s: reason %q, want it to contain %q", c.name, reason, c.reason)
		case string(m.Data) != c.payload:
			t.Errorf("%s: rejected payload differs from the input", c.name)
		case m.Header.Get(HeaderInputSubject) != c.subject:
			t.Errorf("%s: %s header %q, want %q", c.name, HeaderInputSubject, m.Header.Get(HeaderInputSubject), c.subject)
		}
	}
	if ids := appliedProducts(t, in, cat); !slices.Equal(ids, []string{"P-2001", "P-2002", "P-2003"}) {
		t.Errorf("products applied %v, want P-2001, P-2002, P-2003", ids)
	}
	if got := testutil.ToFloat64(in.svc.metrics.messages.WithLabelValues(string(OutcomeRejected))); int(got) != len(cases) {
		t.Errorf("rejected counted %v, want %d", got, len(cases))
	}
	// By reason: each case's class follows from the start of its reason
	// header (`field "subject"`, `message: ...`, `field "..."`).
	wantReason := map[RejectReason]int{}
	for _, m := range rejected {
		r := m.Header.Get(HeaderReason)
		switch {
		case strings.HasPrefix(r, `field "subject"`):
			wantReason[RejectSubject]++
		case strings.HasPrefix(r, "message: "):
			wantReason[RejectMessage]++
		case strings.HasPrefix(r, "field "):
			wantReason[RejectField]++
		default:
			wantReason[RejectModel]++
		}
	}
	for _, r := range rejectReasons {
		if got := testutil.ToFloat64(in.svc.metrics.rejected.WithLabelValues(string(r))); int(got) != wantReason[r] {
			t.Errorf("rivalmix_rejected_total{reason=%s} = %v, want %d", r, got, wantReason[r])
		}
	}
	if _, ok := in.views.Category(cat); !ok {
		t.Error("category missing from the read views after its refit completed")
	}
	info := consumerInfo(t, ctx, js, cfg.Bus)
	if info.NumAckPending != 0 || info.NumPending != 0 || info.AckFloor.Stream != last {
		t.Errorf("consumer: %d unacked, %d pending, ack floor %d; want 0, 0, %d",
			info.NumAckPending, info.NumPending, info.AckFloor.Stream, last)
	}
	if err := in.stop(); err != nil {
		t.Errorf("Run: %v", err)
	}
}

// newTestBus starts an embedded server, connects to it and creates the
// streams of the test service configuration, which it returns.
func newTestBus(t *testing.T, ctx context.Context) (*Embedded, jetstream.JetStream, ServiceConfig) {
	t.Helper()
	e := startTestServer(t)
	_, js := connectTest(t, e.ClientURL())
	cfg := testServiceConfig()
	ensureStreams(t, ctx, js, cfg)
	return e, js, cfg
}

// appliedProducts returns the products of category cat in the state file.
func appliedProducts(t *testing.T, in *instance, cat string) []string {
	t.Helper()
	_, recs := snapshotOf(t, in.store, cat)
	var ids []string
	for _, r := range recs {
		ids = append(ids, r.Product)
	}
	return ids
}

// waitFor polls cond every 10 ms until it holds; it fails the test if the
// service stops first or ctx ends.
func (in *instance) waitFor(ctx context.Context, what string, cond func() bool) {
	in.t.Helper()
	for !cond() {
		select {
		case err := <-in.runErr:
			in.runErr <- err
			in.t.Fatalf("service stopped while waiting for %s: %v", what, err)
		case <-ctx.Done():
			in.t.Fatalf("gave up waiting for %s: %v", what, ctx.Err())
		case <-time.After(10 * time.Millisecond):
		}
	}
}

// TestServiceRejectRetry deletes the rejected stream before a bad message
// arrives, so its publication fails, and creates the stream again a second
// later: the service retries, keeps running, files the message with its
// reason once, and applies the good messages around it.
func TestServiceRejectRetry(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	e, js, cfg := newTestBus(t, ctx)
	// The service creates the streams at start: delete the rejected one
	// once it runs, then send the input.
	in := startInstance(t, e.ClientURL(), filepath.Join(t.TempDir(), "state.db"), cfg, newTestLog(t), instanceOptions{})
	in.waitFor(ctx, "the service to be ready", func() bool { return in.svc.Ready() == nil })
	if err := js.DeleteStream(ctx, cfg.Bus.RejectedStream); err != nil {
		t.Fatalf("DeleteStream: %v", err)
	}
	const cat = "breakfast-cereal"
	subj := input.DefaultInputPrefix + "." + cat
	bad := `{"product":"P-2002","refit":"2026-W40","competitors":2,"relative":[0.5,0.4,0.3]}`
	last := publishInput(t, ctx, js, []inputMsg{
		{subject: subj, data: []byte(`{"product":"P-2001","refit":"2026-W40","competitors":10,"relative":[0.8,0.3]}`)},
		{subject: subj, data: []byte(bad)},
		{subject: subj, data: []byte(`{"product":"P-2003","refit":"2026-W40","competitors":10,"relative":[0.7]}`)},
		{subject: subj, data: []byte(`{"refit":"2026-W40","complete":true,"expected":2}`)},
	})
	failures := func() float64 { return testutil.ToFloat64(in.svc.metrics.retries) }
	in.waitFor(ctx, "two failed publications of the rejected message", func() bool { return failures() >= 2 })
	if in.position() >= last {
		t.Fatalf("position %d reached the end (%d) while the rejected message could not be filed", in.position(), last)
	}
	ensureStreams(t, ctx, js, cfg)
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("service stopped: %v", err)
	}
	msgs := streamMessages(t, ctx, js, cfg.Bus.RejectedStream)
	if len(msgs) != 1 {
		t.Fatalf("rejected stream holds %d messages, want 1", len(msgs))
	}
	if string(msgs[0].Data) != bad || !strings.Contains(msgs[0].Header.Get(HeaderReason), `field "relative"`) {
		t.Errorf("rejected message %q with reason %q", msgs[0].Data, msgs[0].Header.Get(HeaderReason))
	}
	if ids := appliedProducts(t, in, cat); !slices.Equal(ids, []string{"P-2001", "P-2003"}) {
		t.Errorf("products applied %v, want P-2001, P-2003", ids)
	}
	t.Logf("%v failed publications before the stream came back", failures())
	if err := in.stop(); err != nil {
		t.Errorf("Run: %v", err)
	}
}

// TestServiceBrokerRestart shuts the NATS server down right after a
// commit, before its acks, and starts it again on the same store and
// port. The service reconnects and finishes; every message is applied
// once, and both refits' events are on the output stream once. (The
// acks of the interrupted fetch wait in the client's reconnect buffer
// and reach the restarted server; TestServiceRedelivery covers acks that
// are lost.)
func TestServiceBrokerRestart(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()
	dir := t.TempDir()
	e := startTestServerAt(t, dir, -1)
	port := e.Port()
	nc, js := connectTest(t, e.ClientURL())
	cfg := testServiceConfig()
	ensureStreams(t, ctx, js, cfg)
	cereal := newTestCategory("breakfast-cereal", 40, 1001, 51)
	tea := newTestCategory("tea", 24, 3001, 52)
	last0 := publishInput(t, ctx, js, refitMessages(0, cereal, tea))

	// The first commit past input 20 (inside refit 1) shuts the server
	// down before its acks.
	down := make(chan struct{})
	var once sync.Once
	in := startInstance(t, e.ClientURL(), filepath.Join(t.TempDir(), "state.db"), cfg, newTestLog(t), instanceOptions{manual: true})
	in.svc.failpoint = func(stage string) error {
		if stage == "committed" && in.svc.position >= 20 {
			once.Do(func() {
				e.Shutdown()
				close(down)
			})
		}
		return nil
	}
	in.start()
	select {
	case <-down:
	case <-ctx.Done():
		t.Fatal("the service committed nothing past input 20")
	}
	atStop := in.position()
	const outage = time.Second
	time.Sleep(outage)
	startTestServerAt(t, dir, port)
	for !nc.IsConnected() || !in.nc.IsConnected() {
		select {
		case <-ctx.Done():
			t.Fatal("connections did not come back after the restart")
		case <-time.After(20 * time.Millisecond):
		}
	}
	last := publishInput(t, ctx, js, refitMessages(1, cereal, tea))
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("service stopped: %v", err)
	}
	// The fetch whose acks were lost comes back after AckWait and is
	// acked as a duplicate.
	for {
		info := consumerInfo(t, ctx, js, cfg.Bus)
		if info.NumAckPending == 0 && info.NumPending == 0 {
			break
		}
		select {
		case <-ctx.Done():
			t.Fatalf("consumer still has %d unacked and %d pending messages", info.NumAckPending, info.NumPending)
		case <-time.After(50 * time.Millisecond):
		}
	}
	msgs, count := outputEvents(t, ctx, js, cfg.Bus.OutputStream)
	for id, n := range count {
		if n != 1 {
			t.Errorf("event %s stored %d times", id, n)
		}
	}
	kinds := kindCounts(t, msgs)
	for _, c := range []*testCategory{cereal, tea} {
		for r := range 2 {
			id := alerts.EventID(c.name, refitName(r), alerts.KindSummary, c.name)
			if count[id] != 1 {
				t.Errorf("%s: summary of refit %s missing", c.name, refitName(r))
			}
		}
	}
	recs := map[string][]state.ProductRecord{}
	for _, c := range []*testCategory{cereal, tea} {
		_, recs[c.name] = snapshotOf(t, in.store, c.name)
	}
	checkLastRefit(t, recs, refitName(1), cereal, tea)
	applied := testutil.ToFloat64(in.svc.metrics.messages.WithLabelValues(string(OutcomeApplied)))
	dups := testutil.ToFloat64(in.svc.metrics.messages.WithLabelValues(string(OutcomeDuplicate)))
	if int(applied) != int(last) {
		t.Errorf("%v messages applied, want each of the %d once", applied, last)
	}
	t.Logf("broker down for %s after the commit of input %d (refit 1 ends at %d, refit 2 at %d); %v redelivered messages acked as duplicates; events %v",
		outage, atStop, last0, last, dups, kinds)
	if err := in.stop(); err != nil {
		t.Errorf("Run: %v", err)
	}
}

// TestServiceGracefulShutdown cancels Run in the middle of the input,
// right after a commit: Run returns nil, the final flush empties the
// outbox, and nothing applied is left unacked. A restart finishes.
func TestServiceGracefulShutdown(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	e, js, cfg := newTestBus(t, ctx)
	cereal := newTestCategory("breakfast-cereal", 40, 1001, 61)
	tea := newTestCategory("tea", 24, 3001, 62)
	publishInput(t, ctx, js, refitMessages(0, cereal, tea))
	last := publishInput(t, ctx, js, refitMessages(1, cereal, tea))
	path := filepath.Join(t.TempDir(), "state.db")

	// At the first commit past input 90 (inside refit 2, after refit 1's
	// events) the failpoint holds the worker until the test has
	// cancelled Run.
	reached, release := make(chan struct{}), make(chan struct{})
	var once sync.Once
	in := startInstance(t, e.ClientURL(), path, cfg, newTestLog(t), instanceOptions{manual: true})
	in.svc.failpoint = func(stage string) error {
		if stage == "committed" && in.svc.position >= 90 {
			once.Do(func() {
				close(reached)
				<-release
			})
		}
		return nil
	}
	in.start()
	select {
	case <-reached:
	case <-ctx.Done():
		t.Fatal("the service committed nothing past input 90")
	}
	in.cancel()
	close(release)
	if err := in.stop(); err != nil {
		t.Fatalf("Run after cancel: %v, want nil", err)
	}
	st, err := state.Open(path, state.Options{ReadOnly: true, Timeout: 5 * time.Second})
	if err != nil {
		t.Fatal(err)
	}
	pos, _, err := st.Position()
	if err != nil {
		t.Fatal(err)
	}
	n, err := st.OutboxLen()
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Close(); err != nil {
		t.Fatal(err)
	}
	if n != 0 {
		t.Errorf("outbox holds %d events after the graceful stop, want 0", n)
	}
	info := consumerInfo(t, ctx, js, cfg.Bus)
	if info.NumAckPending != 0 || info.Delivered.Stream != pos.StreamSeq || info.AckFloor.Stream != pos.StreamSeq {
		t.Errorf("after the stop: %d unacked, delivered up to %d, acked up to %d; want 0 and the committed position %d twice",
			info.NumAckPending, info.Delivered.Stream, info.AckFloor.Stream, pos.StreamSeq)
	}
	if pos.StreamSeq >= last || info.NumPending == 0 {
		t.Fatalf("stopped at %d of %d with %d pending: not mid-stream", pos.StreamSeq, last, info.NumPending)
	}
	_, count := outputEvents(t, ctx, js, cfg.Bus.OutputStream)
	for _, c := range []*testCategory{cereal, tea} {
		if id := alerts.EventID(c.name, refitName(0), alerts.KindSummary, c.name); count[id] != 1 {
			t.Errorf("%s: summary of refit %s not published before the stop", c.name, refitName(0))
		}
	}

	in = startInstance(t, e.ClientURL(), path, cfg, newTestLog(t), instanceOptions{})
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("restarted service stopped: %v", err)
	}
	recs := map[string][]state.ProductRecord{}
	for _, c := range []*testCategory{cereal, tea} {
		_, recs[c.name] = snapshotOf(t, in.store, c.name)
	}
	checkLastRefit(t, recs, refitName(1), cereal, tea)
	if err := in.stop(); err != nil {
		t.Errorf("Run: %v", err)
	}
}

// TestServiceQuietPeriodAfterRestart stops the worker after it applied a
// refit's products but before the quiet period ended a refit that has no
// refit-complete message; the restarted worker must still complete it
// once the quiet period has passed.
func TestServiceQuietPeriodAfterRestart(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	e := startTestServer(t)
	_, js := connectTest(t, e.ClientURL())
	cfg := testServiceConfig()
	cfg.QuietPeriod = 2 * time.Second
	ensureStreams(t, ctx, js, cfg)
	cereal := newTestCategory("breakfast-cereal", 24, 1001, 71)
	var products []inputMsg
	for _, m := range refitMessages(0, cereal) {
		if !bytes.Contains(m.data, []byte(`"complete":true`)) {
			products = append(products, m)
		}
	}
	last := publishInput(t, ctx, js, products)
	path := filepath.Join(t.TempDir(), "state.db")
	lg := newTestLog(t)
	in := startInstance(t, e.ClientURL(), path, cfg, lg, instanceOptions{})
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("service stopped: %v", err)
	}
	in.abandon()

	in = startInstance(t, e.ClientURL(), path, cfg, lg, instanceOptions{})
	id := alerts.EventID(cereal.name, refitName(0), alerts.KindSummary, cereal.name)
	for {
		if _, count := outputEvents(t, ctx, js, cfg.Bus.OutputStream); count[id] == 1 {
			break
		}
		select {
		case <-ctx.Done():
			t.Fatalf("no summary of refit %s after the restart and the quiet period", refitName(0))
		case <-time.After(100 * time.Millisecond):
		}
	}
	if err := in.stop(); err != nil {
		t.Errorf("Run: %v", err)
	}
}

// TestServiceCommitsAtRefitComplete: when one fetch holds two categories'
// refit-complete messages, each one's effects are committed (and its
// events released) with the messages before it, not only at the end of
// the fetch, so the first category's summary does not wait for the
// second one's settle.
func TestServiceCommitsAtRefitComplete(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	e, js, cfg := newTestBus(t, ctx)
	cfg.FetchSize = 64 // the whole input in one fetch
	cereal := newTestCategory("breakfast-cereal", 12, 1001, 71)
	tea := newTestCategory("tea", 10, 3001, 72)
	msgs := refitMessages(0, cereal, tea)
	last := publishInput(t, ctx, js, msgs)
	first := last - uint64(len(msgs)) + 1
	var completes []uint64
	for i, m := range msgs {
		if strings.Contains(string(m.data), `"complete":true`) {
			completes = append(completes, first+uint64(i))
		}
	}
	if len(completes) != 2 || completes[1] != last {
		t.Fatalf("refit-complete messages at %v of %d..%d; the test wants the last one last", completes, first, last)
	}

	var mu sync.Mutex
	var committed []uint64
	in := startInstance(t, e.ClientURL(), filepath.Join(t.TempDir(), "state.db"), cfg, newTestLog(t), instanceOptions{manual: true})
	in.svc.failpoint = func(stage string) error {
		if stage == "committed" {
			mu.Lock()
			committed = append(committed, in.svc.position)
			mu.Unlock()
		}
		return nil
	}
	in.start()
	in.waitFor(ctx, "the last input", func() bool { return in.position() >= last })
	if err := in.stop(); err != nil {
		t.Fatal(err)
	}
	mu.Lock()
	defer mu.Unlock()
	for _, c := range completes {
		if !slices.Contains(committed, c) {
			t.Errorf("no commit ended at the refit-complete message %d; commits ended at %v", c, committed)
		}
	}
	if len(committed) < 2 || committed[len(committed)-1] != last {
		t.Errorf("commits ended at %v, want the last at %d", committed, last)
	}
}

// histogramCount returns the sample count of the unlabelled histogram
// name in reg.
func histogramCount(t testing.TB, reg prometheus.Gatherer, name string) uint64 {
	t.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, mf := range mfs {
		if mf.GetName() == name {
			return mf.GetMetric()[0].GetHistogram().GetSampleCount()
		}
	}
	t.Fatalf("%s not gathered", name)
	return 0
}

// TestServiceActiveAlertsAfterRestart: the alerts-in-force gauge is
// restored with the category at start, before any new refit, from the
// stored alert memory.
func TestServiceActiveAlertsAfterRestart(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	e, js, cfg := newTestBus(t, ctx)
	cereal := newTestCategory("breakfast-cereal", 24, 1001, 81)
	last := publishInput(t, ctx, js, refitMessages(0, cereal))
	path := filepath.Join(t.TempDir(), "state.db")
	lg := newTestLog(t)
	in := startInstance(t, e.ClientURL(), path, cfg, lg, instanceOptions{})
	if stopped, err := in.waitDone(ctx, last, nil); stopped {
		t.Fatalf("service stopped: %v", err)
	}
	before := testutil.ToFloat64(in.svc.metrics.active.WithLabelValues(cereal.name))
	var sum struct {
		Data alerts.RefitSummary `json:"data"`
	}
	msgs, _ := outputEvents(t, ctx, js, cfg.Bus.OutputStream)
	for _, m := range msgs {
		if strings.HasSuffix(m.Subject, "."+string(alerts.KindSummary)) {
			if err := json.Unmarshal(m.Data, &sum); err != nil {
				t.Fatal(err)
			}
		}
	}
	if int(before) != sum.Data.ActiveAlerts || before == 0 {
		t.Fatalf("gauge %v after the refit, summary says %d active; want them equal and above 0 for this test to mean anything",
			before, sum.Data.ActiveAlerts)
	}
	if err := in.stop(); err != nil {
		t.Fatal(err)
	}
	again := startInstance(t, e.ClientURL(), path, cfg, lg, instanceOptions{noRun: true})
	if got := testutil.ToFloat64(again.svc.metrics.active.WithLabelValues(cereal.name)); got != before {
		t.Errorf("after the restart rivalmix_active_alerts = %v, want %v", got, before)
	}
	again.abandon()
}
