package stream

import (
	"context"
	"fmt"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

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
		s.metrics.CountRejected(ReasonOf(reason))
	}
	s.lg.Info("rejected input", "subject", msg.Subject(), "seq", seq, "reason", reason.Error())
	return nil
}
