package stream

import (
	"context"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

func TestBusConfigValidate(t *testing.T) {
	t.Parallel()
	if err := DefaultBusConfig().Validate(); err != nil {
		t.Fatalf("DefaultBusConfig().Validate() = %v", err)
	}
	tests := []struct {
		name   string
		change func(*BusConfig)
		field  string // the error must name it
	}{
		{"empty input stream", func(c *BusConfig) { c.InputStream = "" }, "InputStream"},
		{"dotted durable", func(c *BusConfig) { c.Durable = "a.b" }, "Durable"},
		{"same streams", func(c *BusConfig) { c.OutputStream = c.InputStream }, "OutputStream"},
		{"input not wildcard", func(c *BusConfig) { c.InputSubjects = "rivalmix.in" }, "InputSubjects"},
		{"input star", func(c *BusConfig) { c.InputSubjects = "rivalmix.*.>" }, "InputSubjects"},
		{"output overlaps input", func(c *BusConfig) { c.OutputSubjects = "rivalmix.in.out.>" }, "OutputSubjects"},
		{"rejected wildcard", func(c *BusConfig) { c.RejectedPrefix = "rivalmix.rejected.>" }, "RejectedPrefix"},
		{"ack wait", func(c *BusConfig) { c.AckWait = 0 }, "AckWait"},
		{"max deliver", func(c *BusConfig) { c.MaxDeliver = 0 }, "MaxDeliver"},
		{"backoff longer than max deliver", func(c *BusConfig) { c.MaxDeliver = 2 }, "BackOff"},
		{"backoff below ack wait", func(c *BusConfig) { c.BackOff = []time.Duration{time.Second, 5 * time.Second} }, "BackOff[0]"},
		{"negative backoff", func(c *BusConfig) { c.BackOff = []time.Duration{time.Minute, -1} }, "BackOff[1]"},
		{"duplicate window", func(c *BusConfig) { c.DuplicateWindow = 0 }, "DuplicateWindow"},
		{"replicas", func(c *BusConfig) { c.Replicas = 0 }, "Replicas"},
		{"max msg size", func(c *BusConfig) { c.MaxMsgSize = -1 }, "MaxMsgSize"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			t.Parallel()
			c := DefaultBusConfig()
			tt.change(&c)
			err := c.Validate()
			if err == nil {
				t.Fatal("Validate() = nil, want an error")
			}
			if !strings.Contains(err.Error(), tt.field) {
				t.Errorf("Validate() = %q, want it to name %s", err, tt.field)
			}
		})
	}
}

func TestBusConfigSubjects(t *testing.T) {
	t.Parallel()
	c := DefaultBusConfig()
	if got := c.InputPrefix(); got != "rivalmix.in" {
		t.Errorf("InputPrefix = %q", got)
	}
	if got := c.OutputPrefix(); got != "rivalmix.out" {
		t.Errorf("OutputPrefix = %q", got)
	}
	for in, want := range map[string]string{
		"rivalmix.in.cereal":      "rivalmix.rejected.cereal",
		"rivalmix.in.a.b":         "rivalmix.rejected._unknown",
		"rivalmix.in":             "rivalmix.rejected._unknown",
		"rivalmix.in.bad$name":    "rivalmix.rejected._unknown",
		"rivalmix.in.snack-bars_": "rivalmix.rejected.snack-bars_",
	} {
		if got := c.RejectedSubject(in); got != want {
			t.Errorf("RejectedSubject(%q) = %q, want %q", in, got, want)
		}
	}
}

func TestEnsureStreams(t *testing.T) {
	t.Parallel()
	e := startTestServer(t)
	_, js := connectTest(t, e.ClientURL())
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	cfg := DefaultBusConfig()
	if err := EnsureStreams(ctx, js, cfg); err != nil {
		t.Fatalf("EnsureStreams: %v", err)
	}
	check := func(name string, subjects []string, dup time.Duration) {
		t.Helper()
		s, err := js.Stream(ctx, name)
		if err != nil {
			t.Fatalf("stream %s: %v", name, err)
		}
		sc := s.CachedInfo().Config
		if !slices.Equal(sc.Subjects, subjects) {
			t.Errorf("stream %s subjects %v, want %v", name, sc.Subjects, subjects)
		}
		if sc.Storage != jetstream.FileStorage {
			t.Errorf("stream %s storage %v, want file", name, sc.Storage)
		}
		if dup > 0 && sc.Duplicates != dup {
			t.Errorf("stream %s duplicate window %s, want %s", name, sc.Duplicates, dup)
		}
	}
	// The bare prefix too, so that a message without a category is kept
	// and rejected with its reason.
	check(cfg.InputStream, []string{"rivalmix.in.>", "rivalmix.in"}, 0)
	check(cfg.OutputStream, []string{"rivalmix.out.>"}, 2*time.Minute)
	check(cfg.RejectedStream, []string{"rivalmix.rejected.>"}, 2*time.Minute)

	cons, err := js.Consumer(ctx, cfg.InputStream, cfg.Durable)
	if err != nil {
		t.Fatalf("consumer: %v", err)
	}
	cc := cons.CachedInfo().Config
	if cc.AckPolicy != jetstream.AckExplicitPolicy || cc.DeliverPolicy != jetstream.DeliverAllPolicy ||
		cc.MaxDeliver != 5 || !slices.Equal(cc.FilterSubjects, []string{"rivalmix.in.>", "rivalmix.in"}) || cc.Durable != "rivalmix-worker" {
		t.Errorf("consumer config %+v", cc)
	}
	if !slices.Equal(cc.BackOff, cfg.BackOff) {
		t.Errorf("consumer backoff %v, want %v", cc.BackOff, cfg.BackOff)
	}
	// The server takes the first backoff as the ack wait.
	if cc.AckWait != cfg.BackOff[0] {
		t.Errorf("consumer ack wait %s, want %s", cc.AckWait, cfg.BackOff[0])
	}

	// Idempotent: the same config again, then an update in place.
	if err := EnsureStreams(ctx, js, cfg); err != nil {
		t.Fatalf("EnsureStreams again: %v", err)
	}
	cfg.MaxDeliver = 7
	cfg.DuplicateWindow = 5 * time.Minute
	if err := EnsureStreams(ctx, js, cfg); err != nil {
		t.Fatalf("EnsureStreams with changes: %v", err)
	}
	check(cfg.OutputStream, []string{"rivalmix.out.>"}, 5*time.Minute)
	cons, err = js.Consumer(ctx, cfg.InputStream, cfg.Durable)
	if err != nil {
		t.Fatalf("consumer: %v", err)
	}
	if got := cons.CachedInfo().Config.MaxDeliver; got != 7 {
		t.Errorf("consumer MaxDeliver after update %d, want 7", got)
	}
	names := js.ListStreams(ctx)
	n := 0
	for range names.Info() {
		n++
	}
	if err := names.Err(); err != nil {
		t.Fatalf("ListStreams: %v", err)
	}
	if n != 3 {
		t.Errorf("%d streams, want 3", n)
	}

	bad := DefaultBusConfig()
	bad.AckWait = 0
	if err := EnsureStreams(ctx, js, bad); err == nil {
		t.Error("EnsureStreams accepted an invalid config")
	}
}

func TestConnectOptionsValidate(t *testing.T) {
	t.Parallel()
	for _, o := range []ConnectOptions{
		{CredsFile: "a.creds", Token: "t"},
		{Password: "p"},
		{TLSCert: "c.pem"},
		{ReconnectWait: -time.Second},
	} {
		if err := o.Validate(); err == nil {
			t.Errorf("%+v: Validate() = nil, want an error", o)
		}
	}
	if err := (ConnectOptions{User: "u", Password: "p", TLSCert: "c", TLSKey: "k", TLSCA: "ca"}).Validate(); err != nil {
		t.Errorf("valid options: %v", err)
	}
}

func TestConnectGivesUpWithContext(t *testing.T) {
	t.Parallel()
	e := startTestServer(t)
	url := e.ClientURL()
	e.Shutdown() // nothing listens there now
	ctx, cancel := context.WithTimeout(context.Background(), 300*time.Millisecond)
	defer cancel()
	start := time.Now()
	nc, err := Connect(ctx, url, ConnectOptions{ReconnectWait: 20 * time.Millisecond}, testLogger(t))
	if err == nil {
		nc.Close()
		t.Fatal("Connect to a stopped server succeeded")
	}
	if d := time.Since(start); d > 5*time.Second {
		t.Errorf("Connect returned after %s, want soon after the context ended", d)
	}
	if _, err := Connect(context.Background(), "", ConnectOptions{}, nil); err == nil {
		t.Error("Connect with an empty url succeeded")
	}
}

func TestConnectWaitsForServer(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	e := startTestServerAt(t, dir, -1)
	port := e.Port()
	url := e.ClientURL()
	e.Shutdown()
	ctx, cancel := context.WithTimeout(context.Background(), 15*time.Second)
	defer cancel()
	type started struct {
		e   *Embedded
		err error
	}
	late := make(chan started, 1)
	go func() {
		// Started after Connect began: Connect must still get through.
		time.Sleep(300 * time.Millisecond)
		e, err := StartEmbedded(ctx, EmbeddedConfig{StoreDir: dir, Port: port, NoLog: true}, nil)
		late <- started{e, err}
	}()
	nc, err := Connect(ctx, url, ConnectOptions{ReconnectWait: 20 * time.Millisecond}, testLogger(t))
	s := <-late
	if s.err != nil {
		t.Fatalf("StartEmbedded: %v", s.err)
	}
	t.Cleanup(s.e.Shutdown)
	if err != nil {
		t.Fatalf("Connect: %v", err)
	}
	defer nc.Close()
	if !nc.IsConnected() {
		t.Errorf("status %v after Connect", nc.Status())
	}
}

func TestRedactURL(t *testing.T) {
	t.Parallel()
	got := redactURL("nats://u:secret@h1:4222,tls://h2:4222")
	if got != "nats://***@h1:4222,tls://h2:4222" {
		t.Errorf("redactURL = %q", got)
	}
}
