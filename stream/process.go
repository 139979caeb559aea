package stream

import (
	"context"
	"errors"
	"fmt"
	"maps"
	"slices"
	"syscall"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"rivalmix/state"
	"rivalmix/stream/category"
	"rivalmix/stream/input"
)

// pendingAck is a message to ack after the commit.
type pendingAck struct {
	msg     jetstream.Msg
	outcome Outcome
}

// part is the run of a fetch's messages that is committed together: up
// to and including the first refit-complete, or to the end of the fetch.
type part struct {
	n       int // messages of the fetch it consumed
	acks    []pendingAck
	outbox  []state.OutboxEvent
	touched map[string]bool
	lastSeq uint64
	// completed holds the stream times of the refit-complete messages
	// the part applied, for rivalmix_refit_latency_seconds.
	completed []time.Time
}

// process applies one fetch as a sequence of parts, each committed and
// acked before the next is applied. A refit-complete ends a part so that
// its summary and events go out with that commit: several categories
// completing in one fetch publish one after the other instead of all
// after the last one's settle.
func (s *Service) process(ctx context.Context, msgs []jetstream.Msg, now time.Time) error {
	for {
		p, err := s.applyPart(ctx, msgs, now)
		if err != nil {
			return err
		}
		if err := s.commitPart(ctx, p, now); err != nil {
			return err
		}
		msgs = msgs[p.n:]
		if len(msgs) == 0 {
			return nil
		}
	}
}

// applyPart applies messages from the start of msgs until one completes
// a refit, then the refits whose quiet period has passed.
func (s *Service) applyPart(ctx context.Context, msgs []jetstream.Msg, now time.Time) (part, error) {
	p := part{touched: map[string]bool{}, lastSeq: s.curPosition()}
	for _, msg := range msgs {
		p.n++
		completed, err := s.handle(ctx, msg, &p, now)
		if err != nil {
			return p, err
		}
		if completed {
			break
		}
	}
	return p, s.quietRefits(&p, now)
}

// handle applies one message to p and reports whether it completed a
// refit.
func (s *Service) handle(ctx context.Context, msg jetstream.Msg, p *part, now time.Time) (bool, error) {
	md, err := msg.Metadata()
	if err != nil {
		return false, fmt.Errorf("stream: message metadata: %w", err)
	}
	seq := md.Sequence.Stream
	if seq <= s.curPosition() {
		// Applied and committed before: a redelivery (rule 3).
		p.acks = append(p.acks, pendingAck{msg, OutcomeDuplicate})
		return false, nil
	}
	p.lastSeq = max(p.lastSeq, seq)
	cat, err := s.cfg.Bus.CategoryOf(msg.Subject())
	if err != nil {
		return false, s.reject(ctx, msg, seq, err)
	}
	m, err := input.Decode(msg.Data(), s.cfg.workerConfig(cat).DecodeOptions(s.cfg.Decode))
	if err != nil {
		return false, s.reject(ctx, msg, seq, err)
	}
	if s.cur != nil && seq <= s.catPos[cat] {
		// Applied before this partition's last takeover: the category's
		// copy is newer than the partition's position (rule 3).
		p.acks = append(p.acks, pendingAck{msg, OutcomeDuplicate})
		return false, nil
	}
	w, err := s.worker(ctx, cat)
	if err != nil {
		return false, err
	}
	if m.Kind == input.KindRefitComplete {
		if w.LastRefit() == m.Refit && w.Changes() == 0 {
			// This refit was completed and nothing changed since: the
			// same refit-complete sent again. Completing it twice would
			// move the particles and re-emit the refit's event ids.
			p.acks = append(p.acks, pendingAck{msg, OutcomeDuplicate})
			return false, nil
		}
		evs, err := s.complete(w, m.Refit, md.Timestamp)
		if err != nil {
			return false, err
		}
		p.outbox = append(p.outbox, evs...)
		p.touched[cat] = true
		p.acks = append(p.acks, pendingAck{msg, OutcomeApplied})
		p.completed = append(p.completed, md.Timestamp)
		return true, nil
	}
	return false, s.apply(ctx, w, m, msg, seq, p, now)
}

// apply applies a datum or a withdrawal; a message the model cannot take
// is rejected with its reason.
func (s *Service) apply(ctx context.Context, w *category.Worker, m input.Message, msg jetstream.Msg, seq uint64, p *part, now time.Time) error {
	t0 := time.Now()
	kept0, _ := w.Particles().ReplaceForms()
	outcome, err := w.Apply(m, seq)
	if err != nil {
		return s.reject(ctx, msg, seq, err)
	}
	if s.metrics != nil {
		s.metrics.ObserveUpdate(time.Since(t0))
		if outcome == category.AppliedReplace {
			kept1, _ := w.Particles().ReplaceForms()
			s.metrics.CountReplace(kept1 > kept0)
		}
	}
	if err := s.fail("applied"); err != nil {
		return err
	}
	if outcome == category.AppliedDuplicate {
		p.acks = append(p.acks, pendingAck{msg, OutcomeDuplicate})
		return nil
	}
	cat := w.Category()
	p.touched[cat] = true
	if outcome != category.AppliedNoop {
		s.lastSeen[cat] = now
		if m.Refit != "" {
			s.lastRefit[cat] = m.Refit
		}
	}
	p.acks = append(p.acks, pendingAck{msg, OutcomeApplied})
	return nil
}

// quietRefits completes the refits left without a completion message for
// the quiet period.
func (s *Service) quietRefits(p *part, now time.Time) error {
	if s.cfg.QuietPeriod <= 0 {
		return nil
	}
	for _, cat := range slices.Sorted(maps.Keys(s.lastSeen)) {
		if s.cur != nil && s.catPart[cat] != s.cur.id {
			continue
		}
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
		p.outbox = append(p.outbox, evs...)
		p.touched[cat] = true
	}
	return nil
}

// commitPart commits p's state changes, events and input position in one
// transaction, then acks its messages (rule 1) and wakes the publisher.
func (s *Service) commitPart(ctx context.Context, p part, now time.Time) error {
	if len(p.touched) == 0 && p.lastSeq == s.curPosition() && len(p.acks) == 0 {
		return nil
	}
	start := time.Now()
	b := state.Batch{Outbox: p.outbox}
	if s.cur == nil && p.lastSeq > s.position {
		b.Position = &state.Position{Stream: s.cfg.Bus.InputStream, StreamSeq: p.lastSeq, UpdatedAt: now.UTC()}
	}
	for _, cat := range slices.Sorted(maps.Keys(p.touched)) {
		w := s.workers[cat]
		ch, err := w.Flush()
		if err != nil {
			return err
		}
		meta := w.Meta(now)
		if s.cur != nil {
			meta.Position = p.lastSeq
		}
		b.Categories = append(b.Categories, state.CategoryUpdate{Category: cat, Snapshot: ch.Snapshot,
			Products: ch.Records, Alerts: ch.AlertMemory, Meta: &meta})
	}
	if err := s.fail("before-commit"); err != nil {
		return err
	}
	if s.cur != nil && !s.claims.Confirm(ctx, s.cur.id) {
		// Another worker may own the partition by now: its commits, not
		// ours, continue the partition.
		return errClaimLost
	}
	t0 := time.Now()
	if len(b.Categories) > 0 || len(b.Outbox) > 0 || b.Position != nil {
		if err := s.commitRetrying(b); err != nil {
			if s.metrics != nil {
				s.metrics.CountMessages(OutcomeFailed, len(p.acks))
			}
			return fmt.Errorf("stream: commit: %w", err)
		}
	}
	if s.metrics != nil {
		s.metrics.ObserveCommit(time.Since(t0))
		for _, at := range p.completed {
			s.metrics.ObserveRefitLatency(time.Since(at))
		}
	}
	if s.cur != nil {
		s.cur.position = max(s.cur.position, p.lastSeq)
		for cat := range p.touched {
			s.catPos[cat] = p.lastSeq
			s.cur.categories[cat] = true
			s.cur.dirty[cat] = true
		}
	} else {
		s.position = max(s.position, p.lastSeq)
	}
	if err := s.fail("committed"); err != nil {
		return err
	}
	// Ack only now that the effect is durable (rule 1).
	counts := map[Outcome]int{}
	for i, a := range p.acks {
		if i == len(p.acks)/2 {
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
	if s.pub != nil && len(p.outbox) > 0 {
		s.pub.Notify()
	}
	if s.cur != nil {
		if err := s.mirrorPartition(ctx, s.cur); err != nil {
			// Retried after the next commit or when idle; a takeover
			// meanwhile re-consumes from the older copy.
			s.lg.Warn("mirror failed", "partition", s.cur.id, "err", err)
		}
	}
	s.lg.Debug("part committed", "messages", p.n, "position", s.position, "events", len(p.outbox), "took", time.Since(start))
	return nil
}

// commitRetrying commits b; while the state file's disk is full it
// retries every second for DiskFullRetry, reporting not-ready, counting
// rivalmix_commit_failures_total{reason="disk_full"} and logging why.
// Nothing is acked meanwhile, so the server keeps the input.
func (s *Service) commitRetrying(b state.Batch) error {
	deadline := time.Now().Add(s.cfg.DiskFullRetry)
	for {
		err := s.store.Commit(b)
		if err == nil {
			s.setReady(nil)
			return nil
		}
		if !errors.Is(err, syscall.ENOSPC) || time.Now().After(deadline) {
			return err
		}
		if s.metrics != nil {
			s.metrics.CountCommitFailure("disk_full")
		}
		s.setReady(fmt.Errorf("state file's disk is full; not acking until a commit succeeds: %w", err))
		s.lg.Error("commit failed: disk full; retrying every second, nothing acked meanwhile", "state", s.store.Path(), "err", err)
		time.Sleep(time.Second)
	}
}

func (s *Service) worker(ctx context.Context, cat string) (*category.Worker, error) {
	if w, ok := s.workers[cat]; ok {
		return w, nil
	}
	if s.cur != nil {
		// A category new to this partition's owner: its newest copy,
		// local or mirrored, if any.
		if err := s.takeCategory(ctx, cat, s.cur.id); err != nil {
			return nil, err
		}
		if w, ok := s.workers[cat]; ok {
			return w, nil
		}
	}
	w, err := category.NewWorker(cat, s.cfg.workerConfig(cat))
	if err != nil {
		return nil, err
	}
	s.workers[cat] = w
	if s.cur != nil {
		s.catPart[cat] = s.cur.id
	}
	return w, nil
}

// complete ends a refit of w's category and returns its outbox events;
// at is the event time (the refit-complete message's stream timestamp).
func (s *Service) complete(w *category.Worker, refit string, at time.Time) ([]state.OutboxEvent, error) {
	t0 := time.Now()
	rep, err := w.CompleteRefit(refit)
	if err != nil {
		return nil, err
	}
	if s.metrics != nil {
		s.metrics.ObserveSettle(time.Since(t0))
		s.metrics.ObserveRefit(rep, w.Particles().NumParticles())
		s.metrics.SetActiveAlerts(w.Category(), w.ActiveAlerts())
	}
	if s.views != nil && len(rep.Products) > 0 {
		if err := s.showRefit(w, rep); err != nil {
			return nil, err
		}
	}
	delete(s.lastSeen, w.Category())
	delete(s.lastRefit, w.Category())
	out := make([]state.OutboxEvent, 0, len(rep.Events))
	for _, ev := range rep.Events {
		oe, err := EncodeEvent(ev, s.cfg.Bus.OutputPrefix(), s.cfg.Events, at)
		if err != nil {
			return nil, err
		}
		out = append(out, oe)
	}
	s.lg.Info("refit complete", "category", w.Category(), "refit", refit, "products", len(rep.Products),
		"segments", len(rep.Summary.Segments), "events", len(out), "ess", rep.ESS)
	return out, nil
}
