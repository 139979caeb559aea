package stream

import (
	"context"
	"encoding/json"
	"fmt"
	"path/filepath"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"

	"rivalmix/stream/input"
)

// BenchmarkIngest measures sustained ingest through the real bus and
// state file: an embedded nats-server with every write fsynced
// (SyncAlways), a bbolt state file fsynced at every commit, the service
// with its default model (P = 256 particles, micro-batches of 256, 10
// refit sweeps, fetches of 256) and the outbox publisher. Four simulated
// categories of 1000 products each send two full refits (4000 product
// vectors and 4 refit-complete messages each, the first adding the
// products, the second replacing them); a refit is published once the
// previous one's summaries arrived. In the second refit a quarter of each
// category's products move to another segment and are drawn afresh from
// it. The others are, in the sub-benchmarks redraw, reestimate and
// reestimate-light: drawn afresh from their segment (the hardest case);
// re-estimated with log-scale noise of sd 0.1 (synth.Sequence.Drift), as
// a weekly refit mostly is; the same with keep_ess 0.9 and batch_sweeps 0.
// Run it once:
//
//	go test -run XXX -bench Ingest -benchtime 1x ./stream/
//
// Reported:
//   - vectors/s: product vectors per second from a refit's first publish
//     to the commit of its last message, over all refits (refit-complete
//     settles included);
//   - apply-vectors/s: the same up to the application of the last product
//     vector, before the refit-complete settles (micro-batch settles
//     included);
//   - settle-s: mean seconds of one category's refit-complete settle
//     (rivalmix_settle_seconds);
//   - publish-vectors/s: how fast the server took the input (first
//     publish to last publish acknowledgement);
//   - p50-s, p99-s: seconds from the publish of a category's refit-complete
//     message (its last message) to the arrival of its summary event on
//     the output stream, 4 samples per refit.
func BenchmarkIngest(b *testing.B) {
	def := DefaultServiceConfig().Worker.Particles
	b.Run("redraw", func(b *testing.B) { benchIngest(b, 0, def.KeepESS, def.Sweeps) })
	b.Run("reestimate", func(b *testing.B) { benchIngest(b, 0.1, def.KeepESS, def.Sweeps) })
	// The re-estimates with the lightest settings: Replaces keep the
	// assignments when their weights allow (keep_ess 0.9) and the
	// micro-batch settles move nothing (batch_sweeps 0); the refit-end
	// settle is unchanged.
	b.Run("reestimate-light", func(b *testing.B) { benchIngest(b, 0.1, 0.9, 0) })
}

func benchIngest(b *testing.B, drift, keepESS float64, sweeps int) {
	const (
		categories = 4
		products   = 1000
		refits     = 2
	)
	var (
		totalVectors, applySeconds, ingestSeconds, publishSeconds float64
		latencies                                                 []float64
		settleSum                                                 float64
		settleCount                                               uint64
	)
	for range b.N {
		r := runIngest(b, categories, products, refits, drift, keepESS, sweeps)
		totalVectors += float64(categories * products * refits)
		applySeconds += r.apply.Seconds()
		ingestSeconds += r.ingest.Seconds()
		publishSeconds += r.publish.Seconds()
		latencies = append(latencies, r.latencies...)
		settleSum += r.settleSum
		settleCount += r.settleCount
	}
	b.ReportMetric(totalVectors/ingestSeconds, "vectors/s")
	b.ReportMetric(totalVectors/applySeconds, "apply-vectors/s")
	b.ReportMetric(totalVectors/publishSeconds, "publish-vectors/s")
	if settleCount > 0 {
		b.ReportMetric(settleSum/float64(settleCount), "settle-s")
	}
	slices.Sort(latencies)
	b.ReportMetric(quantile(latencies, 0.5), "p50-s")
	b.ReportMetric(quantile(latencies, 0.99), "p99-s")
	b.ReportMetric(0, "ns/op") // one op is a whole run; its time says nothing
}

// quantile returns the q-quantile of sorted xs by linear interpolation
// between order statistics (type 7 of Hyndman and Fan); 0 when empty.
func quantile(xs []float64, q float64) float64 {
	if len(xs) == 0 {
		return 0
	}
	h := q * float64(len(xs)-1)
	lo := int(h)
	if lo+1 >= len(xs) {
		return xs[len(xs)-1]
	}
	return xs[lo] + (h-float64(lo))*(xs[lo+1]-xs[lo])
}

// ingestResult sums one runIngest.
type ingestResult struct {
	apply, ingest, publish time.Duration
	latencies              []float64
	settleSum              float64
	settleCount            uint64
}

// commitLog records when each commit reached which input position.
type commitLog struct {
	mu  sync.Mutex
	at  []time.Time
	pos []uint64
}

func (c *commitLog) add(t time.Time, pos uint64) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.at = append(c.at, t)
	c.pos = append(c.pos, pos)
}

// first returns the time of the first commit at or past pos.
func (c *commitLog) first(pos uint64) (time.Time, bool) {
	c.mu.Lock()
	defer c.mu.Unlock()
	for i, p := range c.pos {
		if p >= pos {
			return c.at[i], true
		}
	}
	return time.Time{}, false
}

func runIngest(b *testing.B, categories, products, refits int, drift, keepESS float64, sweeps int) ingestResult {
	b.StopTimer()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Minute)
	defer cancel()
	dir := b.TempDir()
	e, err := StartEmbedded(ctx, EmbeddedConfig{StoreDir: filepath.Join(dir, "jetstream"), Port: -1, NoLog: true}, nil)
	if err != nil {
		b.Fatalf("StartEmbedded: %v", err)
	}
	b.Cleanup(e.Shutdown)
	nc, err := Connect(ctx, e.ClientURL(), ConnectOptions{Name: "bench-client"}, nil)
	if err != nil {
		b.Fatalf("Connect: %v", err)
	}
	b.Cleanup(nc.Close)
	js, err := jetstream.New(nc, jetstream.WithPublishAsyncMaxPending(512))
	if err != nil {
		b.Fatal(err)
	}
	cfg := DefaultServiceConfig()
	cfg.QuietPeriod = 0
	cfg.Worker.Particles.KeepESS = keepESS
	cfg.Worker.Particles.Sweeps = sweeps
	cfg.Bus.MaxAckPending = 4 * cfg.FetchSize // as serve sets it
	ensureStreams(b, ctx, js, cfg)

	// Summary arrivals, by category and refit.
	type key struct{ cat, refit string }
	arrived := map[key]time.Time{}
	var amu sync.Mutex
	summaries := make(chan key, categories*refits)
	sub, err := nc.Subscribe(cfg.Bus.OutputPrefix()+".*.summary", func(m *nats.Msg) {
		now := time.Now()
		var ce struct {
			Data struct {
				Category string `json:"category"`
				Refit    string `json:"refit"`
			} `json:"data"`
		}
		if err := json.Unmarshal(m.Data, &ce); err != nil {
			return
		}
		k := key{ce.Data.Category, ce.Data.Refit}
		amu.Lock()
		_, seen := arrived[k]
		if !seen {
			arrived[k] = now
		}
		amu.Unlock()
		if !seen {
			summaries <- k
		}
	})
	if err != nil {
		b.Fatalf("Subscribe: %v", err)
	}
	b.Cleanup(func() { _ = sub.Unsubscribe() })
	if err := nc.Flush(); err != nil {
		b.Fatal(err)
	}

	var cats []*testCategory
	for c := range categories {
		cats = append(cats, newTestCategory(fmt.Sprintf("bench-%d", c+1), products, 10001+c*products, uint64(100+c)))
		cats[c].seq.Drift = drift
	}
	commits := &commitLog{}
	// applied[k] is when the k-th product vector (1-based) was applied.
	var amuApplied sync.Mutex
	applied := []time.Time{{}}
	in := startInstance(b, e.ClientURL(), filepath.Join(dir, "state.db"), cfg, newTestLog(b), instanceOptions{manual: true})
	in.svc.failpoint = func(stage string) error {
		switch stage {
		case "committed":
			commits.add(time.Now(), in.svc.position)
		case "applied":
			amuApplied.Lock()
			applied = append(applied, time.Now())
			amuApplied.Unlock()
		}
		return nil
	}
	in.start()
	for in.svc.Ready() != nil {
		select {
		case <-ctx.Done():
			b.Fatal("service not ready")
		case <-time.After(10 * time.Millisecond):
		}
	}

	var res ingestResult
	var seq uint64
	b.StartTimer()
	for r := range refits {
		msgs := refitMessages(r, cats...)
		start := time.Now()
		completeSent := map[string]time.Time{}
		futures := make([]jetstream.PubAckFuture, len(msgs))
		for i, m := range msgs {
			f, err := js.PublishMsgAsync(&nats.Msg{Subject: m.subject, Data: m.data}, jetstream.WithStallWait(time.Minute))
			if err != nil {
				b.Fatalf("publish: %v", err)
			}
			futures[i] = f
			if i >= len(msgs)-categories {
				completeSent[m.subject[len(input.DefaultInputPrefix)+1:]] = time.Now()
			}
		}
		select {
		case <-js.PublishAsyncComplete():
		case <-ctx.Done():
			b.Fatal("publishes not acknowledged")
		}
		published := time.Now()
		for _, f := range futures {
			select {
			case ack := <-f.Ok():
				seq = max(seq, ack.Sequence)
			case err := <-f.Err():
				b.Fatalf("publish: %v", err)
			}
		}
		for range categories {
			select {
			case <-summaries:
			case <-ctx.Done():
				b.Fatalf("refit %d: summaries missing", r)
			}
		}
		done, ok := commits.first(seq)
		if !ok {
			b.Fatalf("refit %d: no commit reached input %d", r, seq)
		}
		amuApplied.Lock()
		lastApplied := applied[(r+1)*categories*products]
		amuApplied.Unlock()
		res.publish += published.Sub(start)
		res.apply += lastApplied.Sub(start)
		res.ingest += done.Sub(start)
		var lats []string
		amu.Lock()
		for _, c := range cats {
			lat := arrived[key{c.name, refitName(r)}].Sub(completeSent[c.name])
			res.latencies = append(res.latencies, lat.Seconds())
			lats = append(lats, lat.Round(time.Millisecond).String())
		}
		amu.Unlock()
		b.Logf("refit %d: %d vectors; input published in %s; last vector applied after %s; last commit (settles included) after %s; refit-complete to summary %v",
			r+1, len(msgs)-categories, published.Sub(start).Round(time.Millisecond),
			lastApplied.Sub(start).Round(time.Millisecond), done.Sub(start).Round(time.Millisecond), lats)
	}
	b.StopTimer()
	res.settleSum, res.settleCount = histogramSum(b, in.reg, "rivalmix_settle_seconds")
	upd, n := histogramSum(b, in.reg, "rivalmix_update_seconds")
	com, nc2 := histogramSum(b, in.reg, "rivalmix_commit_seconds")
	b.Logf("updates: %d, mean %.3g ms; commits: %d, mean %.3g ms; settles: %d, mean %.3g s, total %.3g s",
		n, 1e3*upd/float64(max(n, 1)), nc2, 1e3*com/float64(max(nc2, 1)),
		res.settleCount, res.settleSum/float64(max(res.settleCount, 1)), res.settleSum)
	if err := in.stop(); err != nil {
		b.Errorf("Run: %v", err)
	}
	return res
}

// histogramSum returns the sum and count of a histogram in reg.
func histogramSum(b *testing.B, reg *prometheus.Registry, name string) (float64, uint64) {
	b.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		b.Fatal(err)
	}
	for _, mf := range mfs {
		if mf.GetName() == name && len(mf.GetMetric()) > 0 {
			h := mf.GetMetric()[0].GetHistogram()
			return h.GetSampleSum(), h.GetSampleCount()
		}
	}
	return 0, 0
}
