package stream

import (
	"context"
	"errors"
	"fmt"
	"maps"
	"slices"
	"sync"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/state"
)

// errClaimLost stops the processing of a partition whose lease this
// worker can no longer be sure of; the part is neither committed nor
// acked, and the partition is dropped from memory.
var errClaimLost = errors.New("stream: partition lease lost")

// errDuplicateWindow marks an output stream whose duplicate window is too
// short for takeovers.
var errDuplicateWindow = errors.New("duplicate window too short")

// partition is a partition this worker holds.
type partition struct {
	id   int
	cons jetstream.Consumer
	// position is the input stream sequence up to which every message of
	// the partition is applied and committed to the local file.
	position uint64
	// categories are those seen in the partition; dirty those committed
	// locally and not yet mirrored.
	categories map[string]bool
	dirty      map[string]bool
	// mirrored is the position of the last PartitionCopy put.
	mirrored uint64
}

// runPartitioned is Run with partitions: it claims its share of the
// partitions, consumes each from its own durable consumer, mirrors every
// commit, and hands its partitions back when ctx ends.
func (s *Service) runPartitioned(ctx context.Context) error {
	for {
		err := s.startPartitioned(ctx)
		if err == nil {
			break
		}
		s.setReady(err)
		if ctx.Err() != nil {
			return nil
		}
		var apiErr *jetstream.APIError
		if errors.As(err, &apiErr) || errors.Is(err, errDuplicateWindow) {
			return err
		}
		// The cluster may still be electing leaders: try again.
		s.lg.Warn("starting partitioned consumption; retrying", "err", err)
		if !Sleep(ctx, time.Second) {
			return nil
		}
	}
	kctx, stopKeep := context.WithCancel(context.WithoutCancel(ctx))
	var wg sync.WaitGroup
	wg.Go(func() { s.claims.Keep(kctx) })
	defer func() {
		stopKeep()
		wg.Wait()
	}()
	s.setReady(nil)
	s.lg.Info("consuming partitions", "stream", s.cfg.Bus.InputStream, "partitions", s.cfg.Bus.Partitions,
		"claim_ttl", s.cfg.Claims.TTL)
	var nextPlan, nextPending time.Time
	for ctx.Err() == nil {
		if now := time.Now(); !now.Before(nextPending) {
			nextPending = now.Add(s.cfg.PendingRefresh)
			s.refreshPartitionsPending(ctx)
		}
		for _, p := range s.claims.Lost() {
			s.dropPartition(p, "lease lost")
		}
		if now := time.Now(); !now.Before(nextPlan) {
			nextPlan = now.Add(s.cfg.Claims.Interval())
			s.plan(ctx)
		}
		got := 0
		for _, id := range slices.Sorted(maps.Keys(s.parts)) {
			n, err := s.consumePartition(ctx, s.parts[id])
			if err != nil {
				s.setReady(err)
				return err
			}
			got += n
		}
		if got == 0 && !Sleep(ctx, s.cfg.FetchWait) {
			break
		}
	}
	// Graceful stop: mirror what is committed, then give the leases back
	// so that the other workers take over at their next plan.
	lctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	for _, id := range slices.Sorted(maps.Keys(s.parts)) {
		if err := s.mirrorPartition(lctx, s.parts[id]); err != nil {
			s.lg.Warn("final mirror failed", "partition", id, "err", err)
		}
	}
	s.claims.Leave(lctx)
	return nil
}

// startPartitioned creates the streams, checks the output stream's
// duplicate window and opens the claims bucket and the mirror.
func (s *Service) startPartitioned(ctx context.Context) error {
	bc := s.cfg.Bus
	if err := CreateStreams(ctx, s.js, bc); err != nil {
		return err
	}
	out, err := s.js.Stream(ctx, bc.OutputStream)
	if err != nil {
		return fmt.Errorf("stream: output stream %s: %w", bc.OutputStream, err)
	}
	if have, need := out.CachedInfo().Config.Duplicates, s.cfg.MinDuplicateWindow(); have < need {
		return fmt.Errorf("stream: output stream %s has a duplicate window of %s, want >= %s so that events republished after a takeover are dropped: %w",
			bc.OutputStream, have, need, errDuplicateWindow)
	}
	if s.claims, err = OpenClaims(ctx, s.js, s.cfg.clusterClaims(), s.lg); err != nil {
		return err
	}
	if s.mirror, err = OpenMirror(ctx, s.js, s.cfg.MirrorBucket, bc.Replicas); err != nil {
		return err
	}
	return nil
}

// consumePartition fetches what is waiting on one partition and processes
// it; it returns the number of messages fetched. A lost lease drops the
// partition and is not an error.
func (s *Service) consumePartition(ctx context.Context, ps *partition) (int, error) {
	if !s.claims.Confirm(ctx, ps.id) {
		s.dropPartition(ps.id, "lease expired")
		s.claims.Release(ctx, ps.id)
		return 0, nil
	}
	batch, err := ps.cons.FetchNoWait(s.cfg.FetchSize)
	if err != nil {
		s.lg.Warn("fetch failed", "partition", ps.id, "err", err)
		return 0, nil
	}
	var msgs []jetstream.Msg
	for m := range batch.Messages() {
		msgs = append(msgs, m)
	}
	if err := batch.Error(); err != nil && !errors.Is(err, jetstream.ErrNoMessages) {
		s.lg.Debug("fetch ended", "partition", ps.id, "err", err)
	}
	s.cur = ps
	err = s.process(context.WithoutCancel(ctx), msgs, time.Now())
	s.cur = nil
	if errors.Is(err, errClaimLost) {
		s.dropPartition(ps.id, "lease lost before commit")
		s.claims.Release(ctx, ps.id)
		return len(msgs), nil
	}
	if err != nil {
		return len(msgs), err
	}
	if len(msgs) == 0 && (len(ps.dirty) > 0 || ps.mirrored < ps.position) {
		if err := s.mirrorPartition(ctx, ps); err != nil {
			s.lg.Warn("mirror failed", "partition", ps.id, "err", err)
		}
	}
	return len(msgs), nil
}

// refreshPartitionsPending sets the pending count behind ConsumerPending
// to the sum over the partitions held; a failed request keeps the last
// count.
func (s *Service) refreshPartitionsPending(ctx context.Context) {
	var sum int64
	for _, ps := range s.parts {
		rctx, cancel := context.WithTimeout(ctx, pendingTimeout)
		info, err := ps.cons.Info(rctx)
		cancel()
		if err != nil {
			s.lg.Debug("consumer info failed; keeping the last pending count", "partition", ps.id, "err", err)
			return
		}
		sum += int64(info.NumPending) + int64(info.NumAckPending)
	}
	s.pending.Store(sum)
}

// plan takes free partitions up to this worker's share and gives back
// those above it.
func (s *Service) plan(ctx context.Context) {
	taken, surplus, err := s.claims.Plan(ctx)
	if err != nil {
		s.lg.Warn("claims: plan", "err", err)
	}
	for _, p := range surplus {
		if ps, ok := s.parts[p]; ok {
			if err := s.mirrorPartition(ctx, ps); err != nil {
				// Keep it until its copy is current.
				s.lg.Warn("mirror before release failed", "partition", p, "err", err)
				continue
			}
		}
		s.dropPartition(p, "above this worker's share")
		s.claims.Release(ctx, p)
	}
	for _, p := range taken {
		if err := s.takePartition(ctx, p); err != nil {
			s.lg.Warn("take partition", "partition", p, "err", err)
			s.dropPartition(p, "take failed")
			s.claims.Release(ctx, p)
		}
	}
}

// takePartition restores a newly claimed partition: its mirrored position
// and the newest copy of each of its categories, then re-creates its
// durable consumer to deliver from there.
func (s *Service) takePartition(ctx context.Context, p int) error {
	t0 := time.Now()
	pc, _, err := s.mirror.Partition(ctx, p)
	if err != nil {
		return err
	}
	ps := &partition{id: p, position: pc.Position, mirrored: pc.Position,
		categories: map[string]bool{}, dirty: map[string]bool{}}
	start := pc.Position
	for _, cat := range slices.Sorted(maps.Keys(pc.Categories)) {
		if err := s.takeCategory(ctx, cat, p); err != nil {
			return err
		}
		ps.categories[cat] = true
		if got := s.catPos[cat]; got < pc.Categories[cat] {
			// A copy older than the partition's record says it was: a
			// worker that had lost the lease overwrote it. Re-consume from
			// there; newer messages of the other categories are skipped
			// by their own positions.
			start = min(start, got)
		}
	}
	ps.position = start
	bc := s.cfg.Bus
	rev, ok := s.claims.Revision(p)
	if !ok {
		return errClaimLost
	}
	// The earlier takes' consumers go: a worker still fetching from one
	// gets an error, never a message this take needs.
	in, err := s.js.Stream(ctx, bc.InputStream)
	if err != nil {
		return fmt.Errorf("stream: input stream %s: %w", bc.InputStream, err)
	}
	names := in.ConsumerNames(ctx)
	var old []string
	for name := range names.Name() {
		if _, ok := bc.partitionConsumerRev(p, name); ok {
			old = append(old, name)
		}
	}
	if err := names.Err(); err != nil {
		return fmt.Errorf("stream: list consumers of %s: %w", bc.InputStream, err)
	}
	for _, name := range old {
		if err := s.js.DeleteConsumer(ctx, bc.InputStream, name); err != nil && !errors.Is(err, jetstream.ErrConsumerNotFound) {
			return fmt.Errorf("stream: delete consumer %s: %w", name, err)
		}
	}
	cc := bc.PartitionConsumerConfig(p, rev, start+1)
	if ps.cons, err = s.js.CreateConsumer(ctx, bc.InputStream, cc); err != nil {
		return fmt.Errorf("stream: create consumer %s from sequence %d: %w", cc.Durable, start+1, err)
	}
	s.parts[p] = ps
	if s.metrics != nil {
		s.metrics.ObserveTakeover(time.Since(t0))
	}
	s.lg.Info("partition taken", "partition", p, "from", start+1, "categories", len(pc.Categories),
		"previous", pc.Worker, "took", time.Since(t0))
	return nil
}

// takeCategory loads the newest copy of a category into memory: the
// mirrored one when its position is beyond the local file's (it is then
// written to the local file first, which stays the outbox and fast path),
// else the local one.
func (s *Service) takeCategory(ctx context.Context, cat string, p int) error {
	rc, rok, err := s.mirror.Category(ctx, cat)
	if err != nil {
		return err
	}
	lm, lok, err := s.store.Meta(cat)
	if err != nil {
		return err
	}
	pos := lm.Position
	if rok && (!lok || rc.Position > lm.Position) {
		old, err := s.store.Products(cat)
		if err != nil {
			return err
		}
		keep := map[string]bool{}
		for _, r := range rc.Products {
			keep[r.Product] = true
		}
		var removed []string
		for _, r := range old {
			if !keep[r.Product] {
				removed = append(removed, r.Product)
			}
		}
		meta := rc.Meta
		meta.Position = rc.Position
		if err := s.store.Commit(state.Batch{Categories: []state.CategoryUpdate{{Category: cat, Snapshot: rc.Snapshot,
			Products: rc.Products, Removed: removed, Alerts: rc.Alerts, Meta: &meta}}}); err != nil {
			return fmt.Errorf("stream: write mirrored copy of %s to the state file: %w", cat, err)
		}
		pos = rc.Position
	}
	s.lg.Debug("category taken", "category", cat, "partition", p, "local", lm.Position, "mirrored", rc.Position, "from", pos)
	delete(s.workers, cat)
	if err := s.restore(cat); err != nil {
		return err
	}
	s.catPos[cat] = pos
	s.catPart[cat] = p
	return nil
}

// dropPartition forgets a partition and its categories' in-memory state;
// the local file keeps them.
func (s *Service) dropPartition(p int, why string) {
	// A partition whose take failed half-way is not in parts, but some
	// of its categories may be in memory: forget those too.
	_, held := s.parts[p]
	delete(s.parts, p)
	for cat, q := range s.catPart {
		if q != p {
			continue
		}
		delete(s.workers, cat)
		delete(s.lastSeen, cat)
		delete(s.lastRefit, cat)
		delete(s.catPos, cat)
		delete(s.catPart, cat)
	}
	if held {
		s.lg.Info("partition dropped", "partition", p, "why", why)
	}
}

// mirrorPartition puts the partition's changed categories and then its
// position into the object store, once every event committed so far is
// published: a successor that starts from the mirrored position never
// needs an event this worker's outbox still holds.
func (s *Service) mirrorPartition(ctx context.Context, ps *partition) error {
	if len(ps.dirty) == 0 && ps.mirrored >= ps.position {
		return nil
	}
	if !s.claims.Confirm(ctx, ps.id) {
		return errClaimLost
	}
	if s.pub != nil {
		if _, err := s.pub.Flush(ctx); err != nil {
			return fmt.Errorf("publish outbox before mirroring: %w", err)
		}
	}
	for _, cat := range slices.Sorted(maps.Keys(ps.dirty)) {
		cc, err := s.localCopy(cat)
		if err != nil {
			return err
		}
		if err := s.mirror.PutCategory(ctx, cc); err != nil {
			return err
		}
		delete(ps.dirty, cat)
	}
	pc := PartitionCopy{Partition: ps.id, Position: ps.position, Categories: map[string]uint64{},
		Worker: s.cfg.Claims.Worker, UpdatedAt: time.Now().UTC()}
	for cat := range ps.categories {
		pc.Categories[cat] = s.catPos[cat]
	}
	if err := s.mirror.PutPartition(ctx, pc); err != nil {
		return err
	}
	ps.mirrored = ps.position
	return nil
}

// localCopy reads a category's committed state from the local file.
func (s *Service) localCopy(cat string) (CategoryCopy, error) {
	snap, err := s.store.Snapshot(cat)
	if err != nil {
		return CategoryCopy{}, err
	}
	mem, err := s.store.Alerts(cat)
	if err != nil {
		return CategoryCopy{}, err
	}
	recs, err := s.store.Products(cat)
	if err != nil {
		return CategoryCopy{}, err
	}
	meta, _, err := s.store.Meta(cat)
	if err != nil {
		return CategoryCopy{}, err
	}
	return CategoryCopy{Category: cat, Position: meta.Position, Snapshot: snap, Alerts: mem, Products: recs, Meta: meta}, nil
}
