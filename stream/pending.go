package stream

import (
	"context"
	"math"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// pendingTimeout bounds one request for the consumer's info.
const pendingTimeout = 2 * time.Second

// ConsumerPending returns the input messages the consumer has not yet
// delivered or that wait for their ack, as last asked of the server
// (every PendingRefresh while Run runs); NaN before the first answer. It
// makes no request itself, so a metrics scrape never waits on the server.
func (s *Service) ConsumerPending() float64 {
	n := s.pending.Load()
	if n < 0 {
		return math.NaN()
	}
	return float64(n)
}

// refreshPending asks the server for the consumer's info now and every
// PendingRefresh until ctx ends. A failed request keeps the last count.
func (s *Service) refreshPending(ctx context.Context, cons jetstream.Consumer) {
	t := time.NewTicker(s.cfg.PendingRefresh)
	defer t.Stop()
	for {
		rctx, cancel := context.WithTimeout(ctx, pendingTimeout)
		info, err := cons.Info(rctx)
		cancel()
		if err == nil {
			s.pending.Store(int64(info.NumPending) + int64(info.NumAckPending))
		} else if ctx.Err() == nil {
			s.lg.Debug("consumer info failed; keeping the last pending count", "err", err)
		}
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}
