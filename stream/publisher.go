package stream

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"strconv"
	"strings"
	"sync"
	"time"
	"unicode/utf8"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/alerts"
	"rivalmix/state"
)

// OutboxStore is the part of the state store the publisher needs: the
// pending events in commit order, and their removal once published.
// Implementations must be safe for concurrent use, since the publisher
// reads while the worker commits.
type OutboxStore interface {
	// Outbox returns at most limit of the oldest pending entries, in
	// commit order (all when limit <= 0).
	Outbox(limit int) ([]state.OutboxEntry, error)
	// DeleteOutbox removes the entries with the given sequence numbers;
	// unknown ones are ignored.
	DeleteOutbox(seqs ...uint64) error
}

// MsgPublisher publishes one message to JetStream and waits for the
// stream's acknowledgement. jetstream.JetStream implements it.
type MsgPublisher interface {
	PublishMsg(ctx context.Context, msg *nats.Msg, opts ...jetstream.PublishOpt) (*jetstream.PubAck, error)
}

var (
	_ OutboxStore  = (*state.Store)(nil)
	_ MsgPublisher = (jetstream.JetStream)(nil)
)

// Header names on rejected input.
const (
	// HeaderReason carries the reason a message was rejected, e.g.
	// `field "relative[2]": must be a finite number, got 1e400`.
	HeaderReason = "Rivalmix-Reason"
	// HeaderInputSeq carries the input stream sequence of the message.
	HeaderInputSeq = "Rivalmix-Input-Seq"
	// HeaderInputSubject carries the subject the message was published on.
	HeaderInputSubject = "Rivalmix-Input-Subject"
	// HeaderContentType is the CloudEvents NATS binding's content type
	// header; structured mode sets it to alerts.CloudEventContentType.
	HeaderContentType = "content-type"
)

// maxReasonBytes bounds the reason header; the decoder's reasons are far
// shorter, but a header must stay well inside the server's limits.
const maxReasonBytes = 1024

// EncodeEvent turns an event into the outbox entry the publisher sends,
// using the structured content mode of the CloudEvents NATS binding: the
// body is the whole CloudEvent as JSON (alerts.Event.CloudEvent) and the
// only header is content-type: application/cloudevents+json, so a
// consumer needs no header support to read every attribute. The subject
// is alerts.Event.NATSSubject(prefix) (prefix as BusConfig.OutputPrefix),
// the id the event id, which the publisher sends as Nats-Msg-Id. cfg and
// at give the CloudEvents source, type and time attributes (see
// alerts.Event.CloudEvent). Errors wrap alerts.ErrEvent.
func EncodeEvent(ev alerts.Event, prefix string, cfg alerts.CloudEventConfig, at time.Time) (state.OutboxEvent, error) {
	body, err := ev.CloudEvent(cfg, at)
	if err != nil {
		return state.OutboxEvent{}, fmt.Errorf("stream: encode event %s (%s): %w", ev.ID, ev.Kind, err)
	}
	return state.OutboxEvent{
		ID:      ev.ID,
		Subject: ev.NATSSubject(prefix),
		Headers: map[string]string{HeaderContentType: alerts.CloudEventContentType},
		Data:    body,
	}, nil
}

// PublisherConfig tunes a [Publisher]. Zero fields take the defaults of
// [DefaultPublisherConfig].
type PublisherConfig struct {
	// Batch is how many outbox entries are read, published and then
	// deleted together (one fsynced delete per batch); default 128.
	Batch int
	// MinBackoff and MaxBackoff bound the pause after a failed flush; it
	// doubles from MinBackoff up to MaxBackoff while failures continue
	// (default 100 ms and 10 s).
	MinBackoff, MaxBackoff time.Duration
	// Poll is how often Run looks at the outbox without being notified,
	// a safety net for a missed Notify; default 1 s.
	Poll time.Duration
	// Stream, when set, is the stream every event must land in
	// (BusConfig.OutputStream); the server refuses a publish whose
	// subject belongs to another stream.
	Stream string
}

// DefaultPublisherConfig returns batches of 128, a backoff from 100 ms to
// 10 s, a 1 s poll and no expected stream.
func DefaultPublisherConfig() PublisherConfig {
	return PublisherConfig{Batch: 128, MinBackoff: 100 * time.Millisecond, MaxBackoff: 10 * time.Second, Poll: time.Second}
}

func (c PublisherConfig) withDefaults() (PublisherConfig, error) {
	d := DefaultPublisherConfig()
	switch {
	case c.Batch < 0:
		return c, fmt.Errorf("stream: PublisherConfig.Batch is %d, want >= 0 (0 for %d)", c.Batch, d.Batch)
	case c.MinBackoff < 0:
		return c, fmt.Errorf("stream: PublisherConfig.MinBackoff is %s, want >= 0", c.MinBackoff)
	case c.MaxBackoff < 0:
		return c, fmt.Errorf("stream: PublisherConfig.MaxBackoff is %s, want >= 0", c.MaxBackoff)
	case c.Poll < 0:
		return c, fmt.Errorf("stream: PublisherConfig.Poll is %s, want >= 0", c.Poll)
	}
	if c.Batch == 0 {
		c.Batch = d.Batch
	}
	if c.MinBackoff == 0 {
		c.MinBackoff = d.MinBackoff
	}
	if c.MaxBackoff == 0 {
		c.MaxBackoff = d.MaxBackoff
	}
	if c.Poll == 0 {
		c.Poll = d.Poll
	}
	if c.MaxBackoff < c.MinBackoff {
		return c, fmt.Errorf("stream: PublisherConfig.MaxBackoff %s is below MinBackoff %s", c.MaxBackoff, c.MinBackoff)
	}
	return c, nil
}

// Publisher is the outbox publisher: it sends committed events to
// JetStream in commit order, each with Nats-Msg-Id set to the event id,
// and deletes an entry from the outbox only after the stream has
// acknowledged it (durability rule 2). A crash between the publish and the
// delete sends the entry again on restart, and the output stream's
// duplicate window drops the repeat.
//
// Run, Flush and Notify are safe for concurrent use; flushes are
// serialised, so entries are never sent out of order by two flushes.
type Publisher struct {
	store OutboxStore
	js    MsgPublisher
	cfg   PublisherConfig
	lg    *slog.Logger

	wake chan struct{}
	mu   sync.Mutex // serialises flushes
}

// NewPublisher returns a publisher from store to js. lg receives failures
// and retries (nil discards them).
func NewPublisher(store OutboxStore, js MsgPublisher, cfg PublisherConfig, lg *slog.Logger) (*Publisher, error) {
	if store == nil {
		return nil, errors.New("stream: NewPublisher: store is nil")
	}
	if js == nil {
		return nil, errors.New("stream: NewPublisher: publisher is nil")
	}
	cfg, err := cfg.withDefaults()
	if err != nil {
		return nil, err
	}
	if lg == nil {
		lg = slog.New(slog.DiscardHandler)
	}
	return &Publisher{store: store, js: js, cfg: cfg, lg: lg, wake: make(chan struct{}, 1)}, nil
}

// Notify wakes Run to flush now; call it after a commit that added
// events. It never blocks, and notifications coalesce.
func (p *Publisher) Notify() {
	select {
	case p.wake <- struct{}{}:
	default:
	}
}

// Run flushes the outbox whenever notified, and every Poll, until ctx
// ends; then it returns nil. A failed flush is logged and retried after a
// backoff that doubles from MinBackoff to MaxBackoff; entries stay in the
// outbox meanwhile. For a final flush at shutdown call Flush with a fresh
// timeout context after Run has returned.
func (p *Publisher) Run(ctx context.Context) error {
	tick := time.NewTicker(p.cfg.Poll)
	defer tick.Stop()
	backoff := time.Duration(0)
	for {
		n, err := p.Flush(ctx)
		switch {
		case ctx.Err() != nil:
			return nil
		case err != nil:
			backoff = min(max(2*backoff, p.cfg.MinBackoff), p.cfg.MaxBackoff)
			p.lg.Warn("outbox publish failed; retrying", "published", n, "retry_in", backoff, "err", err)
			t := time.NewTimer(backoff)
			select {
			case <-ctx.Done():
				t.Stop()
				return nil
			case <-t.C:
			}
			continue
		}
		if backoff > 0 {
			p.lg.Info("outbox publishing again", "published", n)
			backoff = 0
		}
		select {
		case <-ctx.Done():
			return nil
		case <-p.wake:
		case <-tick.C:
		}
	}
}

// Flush publishes pending entries in commit order until the outbox is
// empty, and returns how many it published. Each entry is published and
// its acknowledgement awaited before the next; the acknowledged entries of
// a batch are then deleted in one transaction. On the first failure it
// deletes the entries acknowledged so far and returns the error, leaving
// the failed entry and those after it in the outbox.
func (p *Publisher) Flush(ctx context.Context) (int, error) {
	p.mu.Lock()
	defer p.mu.Unlock()
	total := 0
	for {
		entries, err := p.store.Outbox(p.cfg.Batch)
		if err != nil {
			return total, fmt.Errorf("stream: read outbox: %w", err)
		}
		if len(entries) == 0 {
			return total, nil
		}
		acked := make([]uint64, 0, len(entries))
		var pubErr error
		for _, e := range entries {
			if pubErr = p.publish(ctx, e); pubErr != nil {
				break
			}
			acked = append(acked, e.Seq)
		}
		if err := p.store.DeleteOutbox(acked...); err != nil {
			return total, fmt.Errorf("stream: delete %d published outbox entries: %w", len(acked), errors.Join(err, pubErr))
		}
		total += len(acked)
		if pubErr != nil {
			return total, pubErr
		}
		if len(entries) < p.cfg.Batch {
			return total, nil
		}
	}
}

func (p *Publisher) publish(ctx context.Context, e state.OutboxEntry) error {
	ev := e.Event
	msg := &nats.Msg{Subject: ev.Subject, Data: ev.Data, Header: make(nats.Header, len(ev.Headers)+1)}
	for k, v := range ev.Headers {
		msg.Header.Set(k, v)
	}
	opts := []jetstream.PublishOpt{jetstream.WithMsgID(ev.ID)}
	if p.cfg.Stream != "" {
		opts = append(opts, jetstream.WithExpectStream(p.cfg.Stream))
	}
	ack, err := p.js.PublishMsg(ctx, msg, opts...)
	if err != nil {
		return fmt.Errorf("stream: publish outbox entry %d (event %s) to %s: %w", e.Seq, ev.ID, ev.Subject, err)
	}
	if ack.Duplicate {
		p.lg.Debug("event already in stream", "event", ev.ID, "subject", ev.Subject, "stream", ack.Stream)
	}
	return nil
}

// PublishRejected publishes a rejected input message's original payload
// to cfg.RejectedSubject(subject) (rivalmix.rejected.<category>, or
// rivalmix.rejected._unknown) with the reason, input sequence and input
// subject in the Rivalmix-Reason, Rivalmix-Input-Seq and
// Rivalmix-Input-Subject headers, and waits for the stream's
// acknowledgement, so the caller may terminate the input message only
// when this returns nil (durability rule 4). A message with seq > 0 is
// published with Nats-Msg-Id "rejected-<seq>", so a redelivered message
// rejected twice within the duplicate window is stored once. Line breaks
// in the reason become spaces and it is cut to 1 KiB.
func PublishRejected(ctx context.Context, js MsgPublisher, cfg BusConfig, subject string, payload []byte, reason string, seq uint64) error {
	msg := &nats.Msg{Subject: cfg.RejectedSubject(subject), Data: payload, Header: nats.Header{}}
	msg.Header.Set(HeaderReason, headerValue(reason, maxReasonBytes))
	msg.Header.Set(HeaderInputSeq, strconv.FormatUint(seq, 10))
	msg.Header.Set(HeaderInputSubject, headerValue(subject, maxReasonBytes))
	var opts []jetstream.PublishOpt
	if seq > 0 {
		opts = append(opts, jetstream.WithMsgID("rejected-"+strconv.FormatUint(seq, 10)))
	}
	if cfg.RejectedStream != "" {
		opts = append(opts, jetstream.WithExpectStream(cfg.RejectedStream))
	}
	if _, err := js.PublishMsg(ctx, msg, opts...); err != nil {
		return fmt.Errorf("stream: publish rejected input seq %d from %q to %s: %w", seq, subject, msg.Subject, err)
	}
	return nil
}

// headerValue makes s safe as a NATS header value: no CR or LF, at most
// limit bytes, cut on a rune boundary.
func headerValue(s string, limit int) string {
	s = strings.Map(func(r rune) rune {
		if r == '\r' || r == '\n' {
			return ' '
		}
		return r
	}, s)
	if len(s) <= limit {
		return s
	}
	cut := limit - len("...")
	for cut > 0 && !utf8.RuneStart(s[cut]) {
		cut--
	}
	return s[:cut] + "..."
}
