package stream

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"sort"
	"sync"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/state"
)

// ServiceConfig holds the settings of the streaming service.
type ServiceConfig struct {
	Bus    BusConfig
	Worker WorkerConfig
	Decode DecodeOptions
	// FetchSize and FetchWait bound one fetch from the input consumer:
	// up to FetchSize messages or FetchWait, whichever comes first; each
	// fetch is committed in one transaction and then acked.
	FetchSize int
	FetchWait time.Duration
	// QuietPeriod completes a category's refit when it received changes
	// but no refit-complete message for this long (0 = never). Refits
	// completed this way are not replay-deterministic: they depend on
	// timing; explicit refit-complete messages are.
	QuietPeriod time.Duration
	// Source is the CloudEvents source prefix; events of category c carry
	// source Source + "/" + c.
	Source string
	// PerCategory overrides Worker for the named categories.
	PerCategory map[string]WorkerConfig
	// RejectRetry is how long a failed publication to the rejected stream
	// is retried (pauses doubling from 100 ms to 5 s) before the service
	// stops with the error; nothing is lost then either, since the batch
	// was neither committed nor acked and is processed again at restart.
	RejectRetry time.Duration
}

// workerConfig returns the settings of one category.
func (c ServiceConfig) workerConfig(cat string) WorkerConfig {
	if w, ok := c.PerCategory[cat]; ok {
		return w
	}
	return c.Worker
}

// DefaultServiceConfig returns fetches of 256 messages or 200 ms, a
// 10-minute quiet period and the defaults of the bus, worker and decoder.
func DefaultServiceConfig() ServiceConfig {
	return ServiceConfig{
		Bus:         DefaultBusConfig(),
		Worker:      DefaultWorkerConfig(),
		Decode:      DefaultDecodeOptions(),
		FetchSize:   256,
		FetchWait:   200 * time.Millisecond,
		QuietPeriod: 10 * time.Minute,
		Source:      "/rivalmix",
		RejectRetry: 2 * time.Minute,
	}
}

// Validate reports the first setting out of range.
func (c ServiceConfig) Validate() error {
	if err := c.Bus.Validate(); err != nil {
		return err
	}
	if err := c.Decode.Validate(); err != nil {
		return err
	}
	if err := c.Worker.Particles.Validate(); err != nil {
		return err
	}
	if err := c.Worker.Alerts.Validate(); err != nil {
		return err
	}
	switch {
	case c.FetchSize < 1:
		return fmt.Errorf("stream: fetch size %d, want >= 1", c.FetchSize)
	case c.FetchWait <= 0:
		return fmt.Errorf("stream: fetch wait %v, want > 0", c.FetchWait)
	case c.QuietPeriod < 0:
		return fmt.Errorf("stream: quiet period %v, want >= 0", c.QuietPeriod)
	case c.RejectRetry < 0:
		return fmt.Errorf("stream: reject retry %v, want >= 0", c.RejectRetry)
	case c.Worker.BatchSize < 1:
		return fmt.Errorf("stream: batch size %d, want >= 1", c.Worker.BatchSize)
	case c.Source == "":
		return errors.New("stream: source is empty")
	}
	for cat, w := range c.PerCategory {
		if err := w.Particles.Validate(); err != nil {
			return fmt.Errorf("stream: category %s: %w", cat, err)
		}
		if err := w.Alerts.Validate(); err != nil {
			return fmt.Errorf("stream: category %s: %w", cat, err)
		}
		if w.BatchSize < 1 || w.Competitors < 1 || w.Competitors > 1000 {
			return fmt.Errorf("stream: category %s: batch size %d and competitors %d, want >= 1 and 1..1000", cat, w.BatchSize, w.Competitors)
		}
	}
	return nil
}

// Service is the durable streaming worker: it consumes input from
// JetStream, applies it to per-category workers, commits state, outbox
// events and the input position in one bbolt transaction per fetch (a
// refit-complete message closes the transaction early), and
// acks the input only after that commit (architecture.md, durability
// rules). The state file's input position is authoritative: at start the
// durable consumer is re-created to deliver from the message after it.
//
// Run is called once; the read side (Views, Metrics) is safe for
// concurrent use while it runs.
type Service struct {
	cfg     ServiceConfig
	lg      *slog.Logger
	js      jetstream.JetStream
	store   *state.Store
	metrics *Metrics
	views   *Views
	pub     *Publisher

	workers   map[string]*Worker
	position  uint64
	lastSeen  map[string]time.Time // categories with changes since their last refit
	lastRefit map[string]string

	mu    sync.Mutex
	ready error

	// failpoint, when set (tests only), is called at named points of a
	// batch; a non-nil error makes process return at once, as if the
	// process died there: nothing after that point happens.
	failpoint func(stage string) error
}

// fail consults the failpoint.
func (s *Service) fail(stage string) error {
	if s.failpoint == nil {
		return nil
	}
	return s.failpoint(stage)
}

// NewService restores every category from store and returns a service
// ready to Run. metrics, views and pub may be nil.
func NewService(lg *slog.Logger, js jetstream.JetStream, store *state.Store, metrics *Metrics, views *Views, pub *Publisher, cfg ServiceConfig) (*Service, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	s := &Service{cfg: cfg, lg: lg, js: js, store: store, metrics: metrics, views: views, pub: pub,
		workers: map[string]*Worker{}, lastSeen: map[string]time.Time{}, lastRefit: map[string]string{},
		ready: errors.New("starting")}
	cats, err := store.Categories()
	if err != nil {
		return nil, err
	}
	for _, c := range cats {
		snap, err := store.Snapshot(c)
		if err != nil {
			return nil, err
		}
		if snap == nil {
			continue
		}
		mem, err := store.Alerts(c)
		if err != nil {
			return nil, err
		}
		recs, err := store.Products(c)
		if err != nil {
			return nil, err
		}
		w, err := RestoreWorker(c, cfg.workerConfig(c), snap, mem, recs)
		if err != nil {
			return nil, err
		}
		s.workers[c] = w
		if w.changes > 0 {
			// A refit was in progress at the last stop; its quiet period
			// starts again now, or it would wait for the next message.
			s.lastSeen[c] = time.Now()
			s.lastRefit[c] = latestRefit(recs)
		}
		if views != nil {
			rep, err := w.Current()
			if err != nil {
				return nil, err
			}
			if len(rep.Products) > 0 {
				views.Update(rep, w.Record)
			}
		}
		lg.Info("restored category", "category", c, "products", w.Particles().Len())
	}
	pos, ok, err := store.Position()
	if err != nil {
		return nil, err
	}
	if ok {
		s.position = pos.StreamSeq
	}
	return s, nil
}

// latestRefit returns the refit of the record applied last.
func latestRefit(recs []state.ProductRecord) string {
	var refit string
	var seq uint64
	for _, r := range recs {
		if r.Refit != "" && r.AppliedSeq >= seq {
			refit, seq = r.Refit, r.AppliedSeq
		}
	}
	return refit
}

// Ready reports nil once the service consumes input, else the reason.
func (s *Service) Ready() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.ready
}

func (s *Service) setReady(err error) {
	s.mu.Lock()
	s.ready = err
	s.mu.Unlock()
}

// Position returns the input stream sequence of the last committed message.
func (s *Service) Position() uint64 { return s.position }

// consumer (re)creates the durable consumer so that it delivers from the
// message after the committed position.
func (s *Service) consumer(ctx context.Context) (jetstream.Consumer, error) {
	bc := s.cfg.Bus
	// A consumer left by an earlier run may start elsewhere; the position
	// in the state file decides.
	if err := s.js.DeleteConsumer(ctx, bc.InputStream, bc.Durable); err != nil && !errors.Is(err, jetstream.ErrConsumerNotFound) {
		return nil, fmt.Errorf("stream: delete consumer %s: %w", bc.Durable, err)
	}
	if err := EnsureStreams(ctx, s.js, bc); err != nil {
		return nil, err
	}
	if s.position == 0 {
		return s.js.Consumer(ctx, bc.InputStream, bc.Durable)
	}
	if err := s.js.DeleteConsumer(ctx, bc.InputStream, bc.Durable); err != nil {
		return nil, fmt.Errorf("stream: delete consumer %s: %w", bc.Durable, err)
	}
	cc := bc.ConsumerConfig()
	cc.DeliverPolicy = jetstream.DeliverByStartSequencePolicy
	cc.OptStartSeq = s.position + 1
	c, err := s.js.CreateConsumer(ctx, bc.InputStream, cc)
	if err != nil {
		return nil, fmt.Errorf("stream: create consumer %s from sequence %d: %w", bc.Durable, cc.OptStartSeq, err)
	}
	return c, nil
}

// Run consumes until ctx is cancelled, then finishes the fetch in hand
// (apply, commit, ack) and returns nil. A commit failure stops it with
// the error: the input stays unacked and is redelivered on restart.
func (s *Service) Run(ctx context.Context) error {
	cons, err := s.consumer(ctx)
	if err != nil {
		s.setReady(err)
		if ctx.Err() != nil {
			// Stopped while starting: nothing was fetched, nothing to finish.
			return nil
		}
		return err
	}
	s.setReady(nil)
	s.lg.Info("consuming", "stream", s.cfg.Bus.InputStream, "consumer", s.cfg.Bus.Durable, "from", s.position+1)
	for ctx.Err() == nil {
		batch, err := cons.Fetch(s.cfg.FetchSize, jetstream.FetchMaxWait(s.cfg.FetchWait))
		if err != nil {
			s.setReady(fmt.Errorf("fetch: %w", err))
			s.lg.Warn("fetch failed; retrying", "err", err)
			if !Sleep(ctx, time.Second) {
				break
			}
			continue
		}
		var msgs []jetstream.Msg
		for m := range batch.Messages() {
			msgs = append(msgs, m)
		}
		if err := batch.Error(); err != nil && !errors.Is(err, errNoMessages) {
			s.lg.Debug("fetch ended", "err", err)
		}
		s.setReady(nil)
		// The batch is processed with a context that is not cancelled by
		// shutdown: a fetched batch is always committed and acked.
		if err := s.process(context.WithoutCancel(ctx), msgs, time.Now()); err != nil {
			s.setReady(err)
			return err
		}
	}
	return nil
}

// errNoMessages is the error a fetch that waited FetchWait without
// messages ends with.
var errNoMessages = jetstream.ErrNoMessages

// Sleep waits for d or until ctx ends, and reports whether the whole
// wait elapsed.
func Sleep(ctx context.Context, d time.Duration) bool {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return false
	case <-t.C:
		return true
	}
}

// pendingAck is a message to ack after the commit.
type pendingAck struct {
	msg     jetstream.Msg
	outcome Outcome
}

// process applies one fetch, commits it and acks it; a refit-complete
// message ends a commit of its own and the rest follows.
func (s *Service) process(ctx context.Context, msgs []jetstream.Msg, now time.Time) error {
	var acks []pendingAck
	var outbox []state.OutboxEvent
	touched := map[string]bool{}
	lastSeq := s.position
	start := time.Now()
	// A refit-complete ends the part of the fetch that is committed
	// together: its summary and events go out with that commit, and the
	// rest of the fetch follows in a commit of its own. Several
	// categories completing in one fetch then publish one after the
	// other instead of all after the last one's settle.
	var rest []jetstream.Msg
	for idx, msg := range msgs {
		md, err := msg.Metadata()
		if err != nil {
			return fmt.Errorf("stream: message metadata: %w", err)
		}
		seq := md.Sequence.Stream
		if seq <= s.position {
			// Applied and committed before: a redelivery (rule 3).
			acks = append(acks, pendingAck{msg, OutcomeDuplicate})
			continue
		}
		lastSeq = max(lastSeq, seq)
		cat, err := CategoryFromSubject(msg.Subject(), s.cfg.Bus.InputPrefix())
		if err != nil {
			if err := s.reject(ctx, msg, seq, err); err != nil {
				return err
			}
			continue
		}
		opt := s.cfg.Decode
		opt.DefaultCompetitors = s.cfg.workerConfig(cat).Competitors
		m, err := Decode(msg.Data(), opt)
		if err != nil {
			if err := s.reject(ctx, msg, seq, err); err != nil {
				return err
			}
			continue
		}
		w, err := s.worker(cat)
		if err != nil {
			return err
		}
		if m.Kind == KindRefitComplete {
			if w.lastRefit == m.Refit && w.changes == 0 {
				// This refit was completed and nothing changed since: the
				// same refit-complete sent again. Completing it twice would
				// move the particles and re-emit the refit's event ids.
				acks = append(acks, pendingAck{msg, OutcomeDuplicate})
				continue
			}
			evs, err := s.complete(w, m.Refit, md.Timestamp)
			if err != nil {
				return err
			}
			outbox = append(outbox, evs...)
			touched[cat] = true
			acks = append(acks, pendingAck{msg, OutcomeApplied})
			if idx+1 < len(msgs) {
				rest = msgs[idx+1:]
				break
			}
			continue
		}
		t0 := time.Now()
		kept0, _ := w.Particles().ReplaceForms()
		outcome, err := w.Apply(m, seq)
		if err != nil {
			if err := s.reject(ctx, msg, seq, err); err != nil {
				return err
			}
			continue
		}
		if s.metrics != nil {
			s.metrics.ObserveUpdate(time.Since(t0))
			if outcome == AppliedReplace {
				kept1, _ := w.Particles().ReplaceForms()
				s.metrics.CountReplace(kept1 > kept0)
			}
		}
		if err := s.fail("applied"); err != nil {
			return err
		}
		switch outcome {
		case AppliedDuplicate:
			acks = append(acks, pendingAck{msg, OutcomeDuplicate})
		default:
			touched[cat] = true
			if outcome != AppliedNoop {
				s.lastSeen[cat] = now
				if m.Refit != "" {
					s.lastRefit[cat] = m.Refit
				}
			}
			acks = append(acks, pendingAck{msg, OutcomeApplied})
		}
	}
	// Refits left without a completion message for the quiet period.
	if s.cfg.QuietPeriod > 0 {
		for _, cat := range sortedKeys(s.lastSeen) {
			if now.Sub(s.lastSeen[cat]) < s.cfg.QuietPeriod {
				continue
			}
			refit := s.lastRefit[cat]
			if refit == "" {
				refit = "quiet-" + now.UTC().Format("20060102T150405Z")
			}
			evs, err := s.complete(s.workers[cat], refit, now)
			if err != nil {
				return err
			}
			outbox = append(outbox, evs...)
			touched[cat] = true
		}
	}
	if len(touched) == 0 && lastSeq == s.position && len(acks) == 0 {
		return nil // rest is empty: a refit-complete always leaves an ack
	}
	b := state.Batch{Outbox: outbox}
	if lastSeq > s.position {
		b.Position = &state.Position{Stream: s.cfg.Bus.InputStream, StreamSeq: lastSeq, UpdatedAt: now.UTC()}
	}
	for _, cat := range sortedKeys(touched) {
		w := s.workers[cat]
		ch, err := w.Flush()
		if err != nil {
			return err
		}
		meta, err := s.meta(cat, w, now)
		if err != nil {
			return err
		}
		b.Categories = append(b.Categories, state.CategoryUpdate{Category: cat, Snapshot: ch.Snapshot,
			Products: ch.Records, Alerts: ch.AlertMemory, Meta: meta})
	}
	if err := s.fail("before-commit"); err != nil {
		return err
	}
	t0 := time.Now()
	if len(b.Categories) > 0 || len(b.Outbox) > 0 || b.Position != nil {
		if err := s.store.Commit(b); err != nil {
			if s.metrics != nil {
				s.metrics.CountMessages(OutcomeFailed, len(acks))
			}
			return fmt.Errorf("stream: commit: %w", err)
		}
	}
	if s.metrics != nil {
		s.metrics.ObserveCommit(time.Since(t0))
	}
	s.position = max(s.position, lastSeq)
	if err := s.fail("committed"); err != nil {
		return err
	}
	// Ack only now that the effect is durable (rule 1).
	counts := map[Outcome]int{}
	for i, a := range acks {
		if i == len(acks)/2 {
			if err := s.fail("acking"); err != nil {
				return err
			}
		}
		if err := a.msg.DoubleAck(ctx); err != nil {
			// Committed but not acked: it will be redelivered and
			// recognised by its sequence.
			s.lg.Warn("ack failed", "subject", a.msg.Subject(), "err", err)
		}
		counts[a.outcome]++
	}
	if s.metrics != nil {
		for o, n := range counts {
			s.metrics.CountMessages(o, n)
		}
	}
	if s.pub != nil && len(outbox) > 0 {
		s.pub.Notify()
	}
	s.lg.Debug("batch committed", "messages", len(msgs)-len(rest), "position", s.position, "events", len(outbox), "took", time.Since(start))
	if len(rest) > 0 {
		return s.process(ctx, rest, now)
	}
	return nil
}

// meta builds the category's bookkeeping record.
func (s *Service) meta(cat string, w *Worker, now time.Time) (*state.CategoryMeta, error) {
	m, _, err := s.store.Meta(cat)
	if err != nil {
		return nil, err
	}
	m.Products = w.Particles().Len()
	m.UpdatedAt = now.UTC()
	if v, ok := s.viewsCategory(cat); ok {
		m.Segments = v.Segments
		m.LastRefit = v.LastRefit
	}
	return &m, nil
}

func (s *Service) viewsCategory(cat string) (CategoryView, bool) {
	if s.views == nil {
		return CategoryView{}, false
	}
	return s.views.Category(cat)
}

// reject publishes msg with the reason to the rejected stream, waits for
// the stream's ack, then terminates the input message (rule 4). A failed
// publication is retried for RejectRetry; the message id makes a retry of
// a publication that did land a duplicate the stream drops.
func (s *Service) reject(ctx context.Context, msg jetstream.Msg, seq uint64, reason error) error {
	pause := 100 * time.Millisecond
	deadline := time.Now().Add(s.cfg.RejectRetry)
	for attempt := 1; ; attempt++ {
		err := PublishRejected(ctx, s.js, s.cfg.Bus, msg.Subject(), msg.Data(), reason.Error(), seq)
		if err == nil {
			break
		}
		if s.metrics != nil {
			s.metrics.CountRejectRetry()
		}
		if !time.Now().Add(pause).Before(deadline) {
			return fmt.Errorf("stream: publish rejected message %d (%d attempts over %v): %w", seq, attempt, s.cfg.RejectRetry, err)
		}
		s.lg.Warn("publishing a rejected message failed; retrying", "seq", seq, "attempt", attempt, "pause", pause, "err", err)
		Sleep(ctx, pause)
		pause = min(2*pause, 5*time.Second)
	}
	if err := msg.TermWithReason(reason.Error()); err != nil {
		s.lg.Warn("terminate failed", "seq", seq, "err", err)
	}
	if s.metrics != nil {
		s.metrics.CountMessages(OutcomeRejected, 1)
	}
	s.lg.Info("rejected input", "subject", msg.Subject(), "seq", seq, "reason", reason.Error())
	return nil
}

func (s *Service) worker(cat string) (*Worker, error) {
	if w, ok := s.workers[cat]; ok {
		return w, nil
	}
	w, err := NewWorker(cat, s.cfg.workerConfig(cat))
	if err != nil {
		return nil, err
	}
	s.workers[cat] = w
	return w, nil
}

// complete ends a refit of w's category and returns its outbox events;
// at is the event time (the refit-complete message's stream timestamp).
func (s *Service) complete(w *Worker, refit string, at time.Time) ([]state.OutboxEvent, error) {
	t0 := time.Now()
	rep, err := w.CompleteRefit(refit)
	if err != nil {
		return nil, err
	}
	if s.metrics != nil {
		s.metrics.ObserveSettle(time.Since(t0))
		s.metrics.ObserveRefit(rep, w.Particles().NumParticles())
	}
	if s.views != nil && len(rep.Products) > 0 {
		s.views.Update(rep, w.Record)
	}
	delete(s.lastSeen, w.Category())
	delete(s.lastRefit, w.Category())
	out := make([]state.OutboxEvent, 0, len(rep.Events))
	for _, ev := range rep.Events {
		oe, err := EncodeEvent(ev, s.cfg.Bus.OutputPrefix(), s.cfg.Source+"/"+w.Category(), at.UTC())
		if err != nil {
			return nil, err
		}
		out = append(out, oe)
	}
	s.lg.Info("refit complete", "category", w.Category(), "refit", refit, "products", len(rep.Products),
		"segments", len(rep.Summary.Segments), "events", len(out), "ess", rep.ESS)
	return out, nil
}

// Categories returns the names of the categories the service holds.
func (s *Service) Categories() []string {
	out := make([]string, 0, len(s.workers))
	for c := range s.workers {
		out = append(out, c)
	}
	sort.Strings(out)
	return out
}
