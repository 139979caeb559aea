package stream

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"maps"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/state"
	"rivalmix/stream/category"
	"rivalmix/stream/read"
)

// Service is the durable streaming worker: it consumes input from
// JetStream, applies it to per-category workers, commits state, outbox
// events and the input position in one bbolt transaction per part of a
// fetch (a refit-complete message ends a part), and acks the input only
// after that commit (the durability rules in the package doc). The state
// file's input position is authoritative: at start the durable consumer is
// re-created to deliver from the message after it.
//
// Run is called once; the read side (views, metrics, Ready,
// ConsumerPending) is safe for concurrent use while it runs.
type Service struct {
	cfg     ServiceConfig
	lg      *slog.Logger
	js      jetstream.JetStream
	store   *state.Store
	metrics *Metrics
	views   *read.Views
	pub     *Publisher

	workers   map[string]*category.Worker
	position  uint64
	lastSeen  map[string]time.Time // categories with changes since their last refit
	lastRefit map[string]string

	mu    sync.Mutex
	ready error

	// pending is the consumer's count of messages not yet delivered or
	// not yet acked, refreshed in the background; -1 until known.
	pending atomic.Int64

	// Partitioned mode (cfg.Bus.Partitioned), used by the service loop
	// only: the leases, the mirror, the partitions held, the one being
	// processed, and per category its position and partition.
	claims  *Claims
	mirror  *Mirror
	parts   map[int]*partition
	cur     *partition
	catPos  map[string]uint64
	catPart map[string]int

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
func NewService(lg *slog.Logger, js jetstream.JetStream, store *state.Store, metrics *Metrics, views *read.Views, pub *Publisher, cfg ServiceConfig) (*Service, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	s := &Service{cfg: cfg, lg: lg, js: js, store: store, metrics: metrics, views: views, pub: pub,
		workers: map[string]*category.Worker{}, lastSeen: map[string]time.Time{}, lastRefit: map[string]string{},
		ready: errors.New("starting"), parts: map[int]*partition{}, catPos: map[string]uint64{}, catPart: map[string]int{}}
	s.pending.Store(-1)
	if cfg.Bus.Partitioned() {
		s.lg = lg.With("worker", cfg.Claims.Worker)
		// Categories are restored from the newest copy, local or
		// mirrored, when their partition is claimed.
		return s, nil
	}
	cats, err := store.Categories()
	if err != nil {
		return nil, err
	}
	for _, c := range cats {
		if err := s.restore(c); err != nil {
			return nil, err
		}
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

// restore rebuilds one category's worker from the store and shows it in
// the views.
func (s *Service) restore(c string) error {
	snap, err := s.store.Snapshot(c)
	if err != nil || snap == nil {
		return err
	}
	mem, err := s.store.Alerts(c)
	if err != nil {
		return err
	}
	recs, err := s.store.Products(c)
	if err != nil {
		return err
	}
	w, err := category.RestoreWorker(c, s.cfg.workerConfig(c), snap, mem, recs)
	if err != nil {
		return err
	}
	s.workers[c] = w
	if s.metrics != nil && w.LastRefit() != "" {
		s.metrics.SetActiveAlerts(c, w.ActiveAlerts())
	}
	if w.Changes() > 0 {
		// A refit was in progress at the last stop; its quiet period
		// starts again now, or it would wait for the next message.
		s.lastSeen[c] = time.Now()
		s.lastRefit[c] = latestRefit(recs)
	}
	if s.views != nil {
		rep, err := w.Current()
		if err != nil {
			return err
		}
		if len(rep.Products) > 0 {
			if err := s.showRefit(w, rep); err != nil {
				return err
			}
		}
	}
	s.lg.Info("restored category", "category", c, "products", w.Particles().Len())
	return nil
}

// showRefit puts a refit's view into the read model.
func (s *Service) showRefit(w *category.Worker, rep category.RefitReport) error {
	v, err := category.NewView(rep, w.Record)
	if err != nil {
		return err
	}
	s.views.Update(v)
	return nil
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

// curPosition is the committed position of the partition being processed,
// or of the whole input with one partition.
func (s *Service) curPosition() uint64 {
	if s.cur != nil {
		return s.cur.position
	}
	return s.position
}

// Categories returns the names of the categories the service holds.
func (s *Service) Categories() []string { return slices.Sorted(maps.Keys(s.workers)) }

// consumer (re)creates the streams and the durable consumer, so that it
// delivers from the message after the committed position.
func (s *Service) consumer(ctx context.Context) (jetstream.Consumer, error) {
	bc := s.cfg.Bus
	if err := CreateStreams(ctx, s.js, bc); err != nil {
		return nil, err
	}
	// A consumer left by an earlier run may start elsewhere; the position
	// in the state file decides.
	if err := s.js.DeleteConsumer(ctx, bc.InputStream, bc.Durable); err != nil && !errors.Is(err, jetstream.ErrConsumerNotFound) {
		return nil, fmt.Errorf("stream: delete consumer %s: %w", bc.Durable, err)
	}
	cc := bc.ConsumerConfig()
	if s.position > 0 {
		cc.DeliverPolicy = jetstream.DeliverByStartSequencePolicy
		cc.OptStartSeq = s.position + 1
	}
	c, err := s.js.CreateConsumer(ctx, bc.InputStream, cc)
	if err != nil {
		return nil, fmt.Errorf("stream: create consumer %s from sequence %d: %w", bc.Durable, s.position+1, err)
	}
	return c, nil
}

// Run consumes until ctx is cancelled, then finishes the fetch in hand
// (apply, commit, ack) and returns nil. A commit failure stops it with
// the error: the input stays unacked and is redelivered on restart.
func (s *Service) Run(ctx context.Context) error {
	if s.cfg.Bus.Partitioned() {
		return s.runPartitioned(ctx)
	}
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
	pctx, stopPending := context.WithCancel(ctx)
	var wg sync.WaitGroup
	wg.Go(func() { s.refreshPending(pctx, cons) })
	defer wg.Wait()
	defer stopPending()
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
		if err := batch.Error(); err != nil && !errors.Is(err, jetstream.ErrNoMessages) {
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
