package stream

import (
	"context"
	"fmt"
	"math"
	"testing"
	"time"
)

// TestConsumerPendingRefresh: the pending count comes from a background
// refresh of the consumer's info, so reading it makes no request: it is
// NaN before the first answer, follows the server while it is up, and is
// still answered, at once, after the server is gone.
func TestConsumerPendingRefresh(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	e, js, cfg := newTestBus(t, ctx)
	cfg.PendingRefresh = 20 * time.Millisecond
	var msgs []inputMsg
	for i := range 7 {
		msgs = append(msgs, inputMsg{subject: "rivalmix.in.breakfast-cereal", data: fmt.Appendf(nil, `{"product":"P-%d","withdrawn":true}`, i)})
	}
	publishInput(t, ctx, js, msgs)
	cons, err := js.Consumer(ctx, cfg.Bus.InputStream, cfg.Bus.Durable)
	if err != nil {
		t.Fatal(err)
	}
	s := &Service{cfg: cfg, lg: newTestLog(t)}
	s.pending.Store(-1)
	if !math.IsNaN(s.ConsumerPending()) {
		t.Errorf("ConsumerPending before any refresh = %v, want NaN", s.ConsumerPending())
	}
	rctx, stop := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() { s.refreshPending(rctx, cons); close(done) }()
	for s.ConsumerPending() != 7 {
		if ctx.Err() != nil {
			t.Fatalf("ConsumerPending = %v, want 7", s.ConsumerPending())
		}
		time.Sleep(5 * time.Millisecond)
	}
	e.Shutdown()
	t0 := time.Now()
	if got := s.ConsumerPending(); got != 7 || time.Since(t0) > 100*time.Millisecond {
		t.Errorf("with the server gone: ConsumerPending = %v after %v, want the last count at once", got, time.Since(t0))
	}
	stop()
	<-done
}
