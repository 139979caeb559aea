package stream

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/alerts"
	"rivalmix/state"
)

// busFixture is a real embedded server with the streams in place and a
// real state file, both in temporary directories.
type busFixture struct {
	cfg   BusConfig
	js    jetstream.JetStream
	store *state.Store
}

func newBusFixture(t *testing.T) *busFixture {
	t.Helper()
	e := startTestServer(t)
	_, js := connectTest(t, e.ClientURL())
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	cfg := DefaultBusConfig()
	if err := EnsureStreams(ctx, js, cfg); err != nil {
		t.Fatalf("EnsureStreams: %v", err)
	}
	store, err := state.Open(filepath.Join(t.TempDir(), "state.db"), state.Options{})
	if err != nil {
		t.Fatalf("state.Open: %v", err)
	}
	t.Cleanup(func() {
		if err := store.Close(); err != nil {
			t.Errorf("store.Close: %v", err)
		}
	})
	return &busFixture{cfg: cfg, js: js, store: store}
}

// testEvents returns n events of category cat as outbox events, encoded
// the way the service encodes them.
func testEvents(t *testing.T, cat, refit string, n int) []state.OutboxEvent {
	t.Helper()
	at := time.Date(2026, 11, 30, 12, 0, 0, 0, time.UTC)
	out := make([]state.OutboxEvent, n)
	for i := range out {
		p := fmt.Sprintf("P-%04d", i)
		ev := alerts.NewEvent(cat, refit, alerts.KindMoved, p,
			alerts.Moved{Category: cat, Refit: refit, Product: p, From: "S1", To: "S2", FromMembership: 0.2, ToMembership: 0.8})
		oe, err := EncodeEvent(ev, alerts.DefaultSubjectPrefix, alerts.DefaultCloudEventConfig(), at)
		if err != nil {
			t.Fatalf("EncodeEvent: %v", err)
		}
		out[i] = oe
	}
	return out
}

func (f *busFixture) commit(t *testing.T, evs []state.OutboxEvent) {
	t.Helper()
	if err := f.store.Commit(state.Batch{Outbox: evs}); err != nil {
		t.Fatalf("Commit: %v", err)
	}
}

func (f *busFixture) outboxSeqs(t *testing.T) []uint64 {
	t.Helper()
	entries, err := f.store.Outbox(0)
	if err != nil {
		t.Fatalf("Outbox: %v", err)
	}
	var seqs []uint64
	for _, e := range entries {
		seqs = append(seqs, e.Seq)
	}
	return seqs
}

func (f *busFixture) streamMsgs(t *testing.T, ctx context.Context, name string) uint64 {
	t.Helper()
	s, err := f.js.Stream(ctx, name)
	if err != nil {
		t.Fatalf("stream %s: %v", name, err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		t.Fatalf("stream %s info: %v", name, err)
	}
	return info.State.Msgs
}

func (f *busFixture) streamMsg(t *testing.T, ctx context.Context, name string, seq uint64) *jetstream.RawStreamMsg {
	t.Helper()
	s, err := f.js.Stream(ctx, name)
	if err != nil {
		t.Fatalf("stream %s: %v", name, err)
	}
	m, err := s.GetMsg(ctx, seq)
	if err != nil {
		t.Fatalf("stream %s message %d: %v", name, seq, err)
	}
	return m
}

// checkingPublisher passes publishes to the real JetStream and checks,
// after each acknowledgement, that the entry is still in the outbox: the
// publisher must not delete before the ack. failAt > 0 makes that publish
// (1-based) fail without reaching the server.
type checkingPublisher struct {
	t      *testing.T
	js     jetstream.JetStream
	store  *state.Store
	failAt int

	mu    sync.Mutex
	calls int
	ids   []string
}

func (c *checkingPublisher) PublishMsg(ctx context.Context, msg *nats.Msg, opts ...jetstream.PublishOpt) (*jetstream.PubAck, error) {
	c.mu.Lock()
	c.calls++
	call := c.calls
	c.mu.Unlock()
	if call == c.failAt {
		return nil, errors.New("injected publish failure")
	}
	ack, err := c.js.PublishMsg(ctx, msg, opts...)
	if err != nil {
		return nil, err
	}
	id := msg.Header.Get(nats.MsgIdHdr)
	entries, err := c.store.Outbox(0)
	if err != nil {
		c.t.Errorf("Outbox: %v", err)
	}
	if !slices.ContainsFunc(entries, func(e state.OutboxEntry) bool { return e.Event.ID == id }) {
		c.t.Errorf("event %s left the outbox before its publish was acknowledged", id)
	}
	c.mu.Lock()
	c.ids = append(c.ids, id)
	c.mu.Unlock()
	return ack, nil
}

func TestPublisherFlush(t *testing.T) {
	t.Parallel()
	f := newBusFixture(t)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	evs := testEvents(t, "cereal", "2026-W48", 5)
	f.commit(t, evs)

	// The third publish fails: the first two are acknowledged and deleted,
	// the rest stay in order.
	cp := &checkingPublisher{t: t, js: f.js, store: f.store, failAt: 3}
	p, err := NewPublisher(f.store, cp, PublisherConfig{Batch: 2, Stream: f.cfg.OutputStream}, testLogger(t))
	if err != nil {
		t.Fatalf("NewPublisher: %v", err)
	}
	n, err := p.Flush(ctx)
	if err == nil || !strings.Contains(err.Error(), "injected") {
		t.Fatalf("Flush = %d, %v; want the injected failure", n, err)
	}
	if n != 2 {
		t.Errorf("Flush published %d before the failure, want 2", n)
	}
	if got := f.outboxSeqs(t); !slices.Equal(got, []uint64{3, 4, 5}) {
		t.Errorf("outbox after the failure holds %v, want [3 4 5]", got)
	}
	if got := f.streamMsgs(t, ctx, f.cfg.OutputStream); got != 2 {
		t.Errorf("output stream holds %d messages, want 2", got)
	}

	n, err = p.Flush(ctx)
	if err != nil || n != 3 {
		t.Fatalf("second Flush = %d, %v; want 3, nil", n, err)
	}
	if got := f.outboxSeqs(t); len(got) != 0 {
		t.Errorf("outbox after Flush holds %v, want nothing", got)
	}
	want := make([]string, len(evs))
	for i, ev := range evs {
		want[i] = ev.ID
	}
	if !slices.Equal(cp.ids, want) {
		t.Errorf("published ids %v, want commit order %v", cp.ids, want)
	}
	for i, ev := range evs {
		m := f.streamMsg(t, ctx, f.cfg.OutputStream, uint64(i+1))
		if m.Subject != "rivalmix.out.cereal.moved" {
			t.Errorf("message %d subject %q", i+1, m.Subject)
		}
		if got := m.Header.Get(nats.MsgIdHdr); got != ev.ID {
			t.Errorf("message %d Nats-Msg-Id %q, want %q", i+1, got, ev.ID)
		}
		if got := m.Header.Get(HeaderContentType); got != alerts.CloudEventContentType {
			t.Errorf("message %d content-type %q", i+1, got)
		}
		var ce struct {
			SpecVersion string          `json:"specversion"`
			ID          string          `json:"id"`
			Type        string          `json:"type"`
			Source      string          `json:"source"`
			Subject     string          `json:"subject"`
			Data        json.RawMessage `json:"data"`
		}
		if err := json.Unmarshal(m.Data, &ce); err != nil {
			t.Fatalf("message %d body: %v", i+1, err)
		}
		if ce.SpecVersion != "1.0" || ce.ID != ev.ID || ce.Type != alerts.DefaultTypePrefix+".segment.moved" ||
			ce.Source != "urn:rivalmix:cereal" || ce.Subject != fmt.Sprintf("P-%04d", i) || len(ce.Data) == 0 {
			t.Errorf("message %d CloudEvent %+v", i+1, ce)
		}
	}

	// A republish of the same ids (a crash between publish and delete)
	// is dropped by the duplicate window and still cleared from the outbox.
	f.commit(t, evs[:3])
	n, err = p.Flush(ctx)
	if err != nil || n != 3 {
		t.Fatalf("Flush of repeats = %d, %v; want 3, nil", n, err)
	}
	if got := f.streamMsgs(t, ctx, f.cfg.OutputStream); got != 5 {
		t.Errorf("output stream holds %d messages after the repeats, want 5", got)
	}
	if got := f.outboxSeqs(t); len(got) != 0 {
		t.Errorf("outbox after the repeats holds %v, want nothing", got)
	}
}

func TestPublisherRunNotifyAndRetry(t *testing.T) {
	t.Parallel()
	f := newBusFixture(t)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()

	// Expecting a stream that does not exist makes every publish fail,
	// so Run backs off and retries; the entries wait in the outbox.
	cfg := PublisherConfig{MinBackoff: 5 * time.Millisecond, MaxBackoff: 20 * time.Millisecond, Poll: time.Hour,
		Stream: "RIVALMIX_ELSEWHERE"}
	bad, err := NewPublisher(f.store, f.js, cfg, testLogger(t))
	if err != nil {
		t.Fatalf("NewPublisher: %v", err)
	}
	f.commit(t, testEvents(t, "cereal", "2026-W48", 3))
	runCtx, stop := context.WithCancel(ctx)
	done := make(chan error, 1)
	go func() { done <- bad.Run(runCtx) }()
	time.Sleep(100 * time.Millisecond)
	stop()
	if err := <-done; err != nil {
		t.Fatalf("Run returned %v after cancel, want nil", err)
	}
	if got := f.outboxSeqs(t); len(got) != 3 {
		t.Fatalf("outbox holds %v after failed publishes, want all 3 entries", got)
	}

	// The right stream: Run publishes at start, then after each Notify
	// (the poll is an hour, so nothing else would wake it).
	cfg.Stream = f.cfg.OutputStream
	p, err := NewPublisher(f.store, f.js, cfg, testLogger(t))
	if err != nil {
		t.Fatalf("NewPublisher: %v", err)
	}
	runCtx, stop = context.WithCancel(ctx)
	defer stop()
	go func() { done <- p.Run(runCtx) }()
	// The stream shows a message as soon as it is stored, a moment
	// before the publisher has the ack and deletes the entry, so wait for
	// both.
	waitMsgs := func(want uint64) {
		t.Helper()
		deadline := time.Now().Add(10 * time.Second)
		for f.streamMsgs(t, ctx, f.cfg.OutputStream) != want || len(f.outboxSeqs(t)) != 0 {
			if time.Now().After(deadline) {
				t.Fatalf("output stream did not reach %d messages with an empty outbox", want)
			}
			time.Sleep(10 * time.Millisecond)
		}
	}
	waitMsgs(3)
	f.commit(t, testEvents(t, "snacks", "2026-W48", 2))
	p.Notify()
	waitMsgs(5)
	stop()
	if err := <-done; err != nil {
		t.Fatalf("Run returned %v, want nil", err)
	}
	if got := f.outboxSeqs(t); len(got) != 0 {
		t.Errorf("outbox holds %v, want nothing", got)
	}
}

func TestNewPublisherErrors(t *testing.T) {
	t.Parallel()
	f := &checkingPublisher{}
	if _, err := NewPublisher(nil, f, PublisherConfig{}, nil); err == nil {
		t.Error("nil store accepted")
	}
	var store *state.Store
	if _, err := NewPublisher(store, nil, PublisherConfig{}, nil); err == nil {
		t.Error("nil publisher accepted")
	}
	if _, err := NewPublisher(store, f, PublisherConfig{Batch: -1}, nil); err == nil || !strings.Contains(err.Error(), "Batch") {
		t.Errorf("negative batch: %v", err)
	}
	if _, err := NewPublisher(store, f, PublisherConfig{MinBackoff: time.Second, MaxBackoff: time.Millisecond}, nil); err == nil ||
		!strings.Contains(err.Error(), "MaxBackoff") {
		t.Errorf("max below min backoff: %v", err)
	}
}

func TestPublishRejected(t *testing.T) {
	t.Parallel()
	f := newBusFixture(t)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	payload := []byte(`{"product":"P-1","refit":"W1","relative":[NaN]}`)
	reason := "field \"relative[0]\": not valid JSON\r\nsecond line"
	if err := PublishRejected(ctx, f.js, f.cfg, "rivalmix.in.cereal", payload, reason, 42); err != nil {
		t.Fatalf("PublishRejected: %v", err)
	}
	if err := PublishRejected(ctx, f.js, f.cfg, "rivalmix.in.a.b", []byte("x"), "subject has two tokens", 43); err != nil {
		t.Fatalf("PublishRejected unknown category: %v", err)
	}
	// The same input sequence again (a redelivery rejected twice) is
	// stored once.
	if err := PublishRejected(ctx, f.js, f.cfg, "rivalmix.in.cereal", payload, reason, 42); err != nil {
		t.Fatalf("PublishRejected repeat: %v", err)
	}
	if got := f.streamMsgs(t, ctx, f.cfg.RejectedStream); got != 2 {
		t.Errorf("rejected stream holds %d messages, want 2", got)
	}
	m := f.streamMsg(t, ctx, f.cfg.RejectedStream, 1)
	if m.Subject != "rivalmix.rejected.cereal" || string(m.Data) != string(payload) {
		t.Errorf("rejected message 1: subject %q, data %q", m.Subject, m.Data)
	}
	if got := m.Header.Get(HeaderReason); got != "field \"relative[0]\": not valid JSON  second line" {
		t.Errorf("%s = %q", HeaderReason, got)
	}
	if got := m.Header.Get(HeaderInputSeq); got != "42" {
		t.Errorf("%s = %q", HeaderInputSeq, got)
	}
	if got := m.Header.Get(HeaderInputSubject); got != "rivalmix.in.cereal" {
		t.Errorf("%s = %q", HeaderInputSubject, got)
	}
	m = f.streamMsg(t, ctx, f.cfg.RejectedStream, 2)
	if m.Subject != "rivalmix.rejected._unknown" || m.Header.Get(HeaderInputSubject) != "rivalmix.in.a.b" ||
		m.Header.Get(HeaderInputSeq) != strconv.Itoa(43) {
		t.Errorf("rejected message 2: subject %q, headers %v", m.Subject, m.Header)
	}
}

func TestHeaderValue(t *testing.T) {
	t.Parallel()
	long := strings.Repeat("é", 1000) // 2000 bytes
	got := headerValue(long, 1024)
	if len(got) > 1024 || !strings.HasSuffix(got, "...") || !strings.HasPrefix(got, "éé") {
		t.Errorf("headerValue cut to %d bytes: %q...", len(got), got[:10])
	}
	if got := headerValue("a\nb\rc", 100); got != "a b c" {
		t.Errorf("headerValue = %q", got)
	}
}
