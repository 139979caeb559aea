package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"log/slog"
	"math"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/nats-io/nats.go/micro"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"

	"rivalmix/alerts"
	"rivalmix/figures"
	"rivalmix/state"
	"rivalmix/stream"
	"rivalmix/stream/read"
)

// serviceFlags are the flags shared by serve and demo.
type serviceFlags struct {
	natsURL, listen, stateFile, httpAddr, configFile string
	conn                                             stream.ConnectOptions
	events                                           alerts.CloudEventConfig
	seed                                             uint64
	particles, batch, fetch                          int
	fetchWait, quiet, rejectRetry                    time.Duration
	logLevel                                         string
	replicas                                         int
	coSegmentLimit                                   int
	partitions                                       int
	claimTTL                                         time.Duration
	workerID                                         string
	dupWindow                                        time.Duration
}

func (f *serviceFlags) register(fs *flag.FlagSet, defaultState, defaultListen string) {
	sc := stream.DefaultServiceConfig()
	fs.StringVar(&f.natsURL, "nats", "", "NATS server URL; empty starts an embedded server with JetStream (store beside the state file, every write fsynced)")
	fs.StringVar(&f.listen, "listen", defaultListen, "client address of the embedded server (host:port; port -1 picks a free one)")
	fs.StringVar(&f.stateFile, "state", defaultState, "bbolt state file of this worker")
	fs.StringVar(&f.httpAddr, "http-addr", "127.0.0.1:8080", "address of the HTTP server (metrics, health, read API, dashboard); empty disables it")
	fs.StringVar(&f.configFile, "config", "", "optional YAML file of per-category model and alert settings")
	connFlags(fs, &f.conn)
	eventFlags(fs, &f.events)
	fs.Uint64Var(&f.seed, "seed", sc.Worker.Seed, "random seed of new categories")
	fs.IntVar(&f.particles, "particles", sc.Worker.Particles.Particles, "particles per category")
	fs.IntVar(&f.batch, "batch", sc.Worker.BatchSize, "changed products per micro-batch (a settle after each)")
	fs.IntVar(&f.fetch, "fetch", sc.FetchSize, "messages per fetch (committed and acked together; a refit-complete ends a commit early)")
	fs.DurationVar(&f.fetchWait, "fetch-wait", sc.FetchWait, "longest wait for a fetch to fill")
	fs.DurationVar(&f.quiet, "quiet-period", sc.QuietPeriod, "complete a refit after this long without messages or a refit-complete message (0 = never)")
	fs.DurationVar(&f.rejectRetry, "reject-retry", sc.RejectRetry, "how long to retry filing a rejected message on the rejected stream before stopping (nothing is lost: the batch is processed again at restart)")
	fs.StringVar(&f.logLevel, "log-level", "info", "debug, info, warn or error")
	fs.IntVar(&f.coSegmentLimit, "cosegment-limit", figures.DefaultCoSegmentLimit, "largest category (products) whose co-segment heatmap the dashboard draws")
	fs.IntVar(&f.replicas, "replicas", sc.Bus.Replicas, "copies of each stream, consumer, claims bucket and state object store in a NATS cluster (3 across failure domains in production; the embedded server is one machine only)")
	fs.IntVar(&f.partitions, "partitions", sc.Bus.Partitions, "partitions the categories are spread over by the server's partition() mapping; > 1 runs this worker as one of several, each partition claimed by one worker at a time (fixed when the input stream is created)")
	fs.DurationVar(&f.claimTTL, "claim-ttl", sc.Claims.TTL, "lease lifetime of a claimed partition: a stopped worker's partitions are taken over within this plus about a second")
	fs.DurationVar(&f.dupWindow, "duplicate-window", sc.Bus.DuplicateWindow, "how long the output stream remembers event ids, set at every start: an event re-sent within it (after a crash or a takeover) is dropped, so make it longer than the longest outage to ride out (raised to 2 x --claim-ttl + 1m when partitioned)")
	fs.StringVar(&f.workerID, "worker-id", "", "this worker's name in the claims bucket (letters, digits, '-', '_'); empty means <hostname>-<pid>")
}

func (f *serviceFlags) serviceConfig() (stream.ServiceConfig, error) {
	sc := stream.DefaultServiceConfig()
	if f.coSegmentLimit < 0 {
		return sc, fmt.Errorf("--cosegment-limit %d: want 0 (the default, %d products) or more", f.coSegmentLimit, figures.DefaultCoSegmentLimit)
	}
	sc.Worker.Seed = f.seed
	sc.Worker.Particles.Particles = f.particles
	sc.Worker.BatchSize = f.batch
	sc.FetchSize = f.fetch
	sc.FetchWait = f.fetchWait
	sc.QuietPeriod = f.quiet
	sc.RejectRetry = f.rejectRetry
	sc.Bus.Replicas = f.replicas
	// Zero values (flags built in code, not parsed) keep the defaults.
	if f.partitions != 0 {
		sc.Bus.Partitions = f.partitions
	}
	if f.claimTTL != 0 {
		sc.Claims.TTL = f.claimTTL
	}
	switch {
	case f.dupWindow < 0:
		return sc, fmt.Errorf("--duplicate-window %s: want a positive duration (the default is %s)", f.dupWindow, sc.Bus.DuplicateWindow)
	case f.dupWindow > 0:
		sc.Bus.DuplicateWindow = f.dupWindow
	}
	sc.Claims.Worker = f.workerID
	if sc.Claims.Worker == "" {
		sc.Claims.Worker = defaultWorkerID()
	}
	if sc.Bus.Partitioned() && sc.Bus.DuplicateWindow < sc.MinDuplicateWindow() {
		sc.Bus.DuplicateWindow = sc.MinDuplicateWindow()
	}
	sc.Events = f.events
	def, per, err := loadSettings(f.configFile, sc.Worker)
	if err != nil {
		return sc, err
	}
	sc.Worker, sc.PerCategory = def, per
	if sc.Bus.MaxAckPending == 0 || sc.Bus.MaxAckPending <= sc.FetchSize {
		sc.Bus.MaxAckPending = 4 * sc.FetchSize
	}
	return sc, sc.Validate()
}

func newLogger(level string, w *os.File) (*slog.Logger, error) {
	var l slog.Level
	if err := l.UnmarshalText([]byte(level)); err != nil {
		return nil, fmt.Errorf("--log-level %q: want debug, info, warn or error", level)
	}
	return slog.New(slog.NewTextHandler(w, &slog.HandlerOptions{Level: l})), nil
}

// running is a started service with everything around it.
type running struct {
	lg       *slog.Logger
	embedded *stream.Embedded
	nc       *nats.Conn
	js       jetstream.JetStream
	store    *state.Store
	svc      *stream.Service
	pub      *stream.Publisher
	views    *read.Views
	micro    micro.Service
	httpLn   net.Listener
	stopHTTP context.CancelFunc
	natsURL  string

	wg   sync.WaitGroup
	errs chan error
}

// start builds and starts every component; run the returned service's
// loops with (*running).run.
func start(ctx context.Context, f *serviceFlags, sc stream.ServiceConfig, lg *slog.Logger) (*running, error) {
	r := &running{lg: lg, errs: make(chan error, 4)}
	ok := false
	defer func() {
		if !ok {
			r.close()
		}
	}()
	var err error
	if r.store, err = state.Open(f.stateFile, state.Options{}); err != nil {
		return nil, err
	}
	r.natsURL = f.natsURL
	if r.natsURL == "" && sc.Bus.Replicas > 1 {
		return nil, fmt.Errorf("--replicas %d needs a NATS cluster (--nats URL): the embedded server is one server on one machine and keeps one copy", sc.Bus.Replicas)
	}
	if r.natsURL == "" {
		host, portStr, err := net.SplitHostPort(f.listen)
		if err != nil {
			return nil, fmt.Errorf("--listen %q: %w", f.listen, err)
		}
		port, err := strconv.Atoi(portStr)
		if err != nil {
			return nil, fmt.Errorf("--listen %q: port: %w", f.listen, err)
		}
		r.embedded, err = stream.StartEmbedded(ctx, stream.EmbeddedConfig{
			StoreDir: f.stateFile + ".jetstream", Host: host, Port: port, NoLog: true}, lg)
		if err != nil {
			return nil, err
		}
		r.natsURL = r.embedded.ClientURL()
		lg.Info("embedded NATS server started", "url", r.natsURL, "store", f.stateFile+".jetstream")
	}
	conn := f.conn
	conn.Name = "rivalmix"
	if r.nc, err = stream.Connect(ctx, r.natsURL, conn, lg); err != nil {
		return nil, err
	}
	if r.js, err = jetstream.New(r.nc); err != nil {
		return nil, fmt.Errorf("jetstream: %w", err)
	}
	// The streams only: the durable consumer is the service's, which
	// re-creates it at Run to deliver from the state file's position.
	if err := createStreams(ctx, r.js, sc.Bus, lg); err != nil {
		return nil, err
	}
	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}),
		stream.NewBuildInfo(buildInfo()))
	var svc *stream.Service
	metrics := stream.NewMetrics(reg,
		func() float64 {
			n, err := r.store.OutboxLen()
			if err != nil {
				return math.NaN()
			}
			return float64(n)
		},
		func() float64 {
			// The service refreshes the count in the background: a scrape
			// reads it and never waits on the server.
			if svc == nil {
				return math.NaN()
			}
			return svc.ConsumerPending()
		})
	r.views = read.NewViews()
	r.views.SetCoSegmentLimit(f.coSegmentLimit)
	pc := stream.DefaultPublisherConfig()
	pc.Stream = sc.Bus.OutputStream
	if r.pub, err = stream.NewPublisher(r.store, r.js, pc, lg); err != nil {
		return nil, err
	}
	if svc, err = stream.NewService(lg, r.js, r.store, metrics, r.views, r.pub, sc); err != nil {
		return nil, err
	}
	r.svc = svc
	if r.micro, err = read.StartMicro(r.nc, r.views); err != nil {
		return nil, err
	}
	if f.httpAddr != "" {
		if r.httpLn, err = read.Listen(f.httpAddr); err != nil {
			return nil, err
		}
		h := read.NewHTTPHandler(r.views, reg, svc.Ready, lg)
		var hctx context.Context
		hctx, r.stopHTTP = context.WithCancel(context.Background())
		r.wg.Add(1)
		go func() {
			defer r.wg.Done()
			if err := read.Serve(hctx, r.httpLn, h, lg); err != nil {
				r.errs <- fmt.Errorf("http: %w", err)
			}
		}()
	}
	ok = true
	return r, nil
}

// run runs the service loop and the outbox publisher until ctx ends or
// one of them fails, then drains the outbox once more.
func (r *running) run(ctx context.Context) error {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	r.wg.Add(2)
	go func() {
		defer r.wg.Done()
		if err := r.pub.Run(ctx); err != nil && !errors.Is(err, context.Canceled) {
			r.errs <- fmt.Errorf("publisher: %w", err)
		}
	}()
	svcDone := make(chan error, 1)
	go func() {
		defer r.wg.Done()
		svcDone <- r.svc.Run(ctx)
	}()
	var err error
	select {
	case err = <-svcDone:
	case err = <-r.errs:
		cancel()
		<-svcDone
	}
	cancel()
	// Graceful path: everything committed is published before we stop.
	fctx, fcancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer fcancel()
	if _, ferr := r.pub.Flush(fctx); ferr != nil && err == nil {
		err = fmt.Errorf("final outbox flush: %w", ferr)
	}
	return err
}

// close stops everything that was started, in reverse order.
func (r *running) close() {
	if r.micro != nil {
		_ = r.micro.Stop()
	}
	if r.nc != nil {
		_ = r.nc.Drain()
		for i := 0; i < 50 && !r.nc.IsClosed(); i++ {
			time.Sleep(20 * time.Millisecond)
		}
	}
	if r.stopHTTP != nil {
		r.stopHTTP()
	}
	r.wg.Wait()
	if r.embedded != nil {
		r.embedded.Shutdown()
	}
	if r.store != nil {
		if err := r.store.Close(); err != nil {
			r.lg.Warn("close state", "err", err)
		}
	}
}

// createStreams creates the streams, retrying for up to a minute when
// the server does not answer in time: a cluster that is still electing
// its leaders, or several workers creating replicated streams at once.
// An error the server gives (a bad configuration) is returned at once.
func createStreams(ctx context.Context, js jetstream.JetStream, bc stream.BusConfig, lg *slog.Logger) error {
	deadline := time.Now().Add(time.Minute)
	for {
		err := stream.CreateStreams(ctx, js, bc)
		var apiErr *jetstream.APIError
		if err == nil || errors.As(err, &apiErr) || time.Now().After(deadline) || ctx.Err() != nil {
			return err
		}
		lg.Warn("creating streams; retrying", "err", err)
		if !stream.Sleep(ctx, time.Second) {
			return err
		}
	}
}

// defaultWorkerID is <hostname>-<pid> with every character outside the
// claims bucket's key alphabet replaced by '-'.
func defaultWorkerID() string {
	host, err := os.Hostname()
	if err != nil || host == "" {
		host = "worker"
	}
	b := []byte(host)
	for i, c := range b {
		if !('a' <= c && c <= 'z' || 'A' <= c && c <= 'Z' || '0' <= c && c <= '9' || c == '_' || c == '-') {
			b[i] = '-'
		}
	}
	return string(b) + "-" + strconv.Itoa(os.Getpid())
}

// absPath is for messages: the state file as the user should find it.
func absPath(p string) string {
	if a, err := filepath.Abs(p); err == nil {
		return a
	}
	return p
}
