package stream

import (
	"context"
	"log/slog"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// testLogger sends log lines to the test log, shown when a test fails.
func testLogger(t *testing.T) *slog.Logger {
	t.Helper()
	return slog.New(slog.NewTextHandler(testWriter{t}, &slog.HandlerOptions{Level: slog.LevelDebug}))
}

type testWriter struct{ t *testing.T }

func (w testWriter) Write(p []byte) (int, error) {
	w.t.Helper()
	w.t.Log(strings.TrimRight(string(p), "\n"))
	return len(p), nil
}

// startTestServer starts an embedded server on a random loopback port
// with its store in a fresh temporary directory, and shuts it down when
// the test ends. A server that does not start fails the test.
func startTestServer(t *testing.T) *Embedded {
	t.Helper()
	return startTestServerAt(t, t.TempDir(), -1)
}

func startTestServerAt(t *testing.T, dir string, port int) *Embedded {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 15*time.Second)
	defer cancel()
	e, err := StartEmbedded(ctx, EmbeddedConfig{StoreDir: dir, Port: port, NoLog: true}, nil)
	if err != nil {
		t.Fatalf("StartEmbedded: %v", err)
	}
	t.Cleanup(e.Shutdown)
	return e
}

// connectTest connects to url and closes the connection when the test
// ends.
func connectTest(t *testing.T, url string) (*nats.Conn, jetstream.JetStream) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	nc, err := Connect(ctx, url, ConnectOptions{Name: t.Name(), ReconnectWait: 50 * time.Millisecond}, testLogger(t))
	if err != nil {
		t.Fatalf("Connect: %v", err)
	}
	t.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatalf("jetstream.New: %v", err)
	}
	return nc, js
}

func TestStartEmbedded(t *testing.T) {
	t.Parallel()
	e := startTestServer(t)
	if !strings.HasPrefix(e.ClientURL(), "nats://127.0.0.1:") {
		t.Errorf("ClientURL = %q, want nats://127.0.0.1:<port>", e.ClientURL())
	}
	if e.Port() <= 0 {
		t.Errorf("Port = %d, want the picked port", e.Port())
	}
	opts := e.srv.JetStreamConfig()
	if opts == nil {
		t.Fatal("JetStream is not enabled")
	}
	if !opts.SyncAlways {
		t.Error("JetStream SyncAlways is false; every write must be fsynced")
	}
	_, js := connectTest(t, e.ClientURL())
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	if _, err := js.AccountInfo(ctx); err != nil {
		t.Fatalf("AccountInfo: %v", err)
	}
}

// TestEmbeddedRestartKeepsStreams restarts the server on the same store
// and port, as the broker-restart check does: the stream and its
// messages survive, and a connection made before the restart reconnects.
func TestEmbeddedRestartKeepsStreams(t *testing.T) {
	t.Parallel()
	dir := t.TempDir()
	e := startTestServerAt(t, dir, -1)
	port := e.Port()
	nc, js := connectTest(t, e.ClientURL())
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	cfg := DefaultBusConfig()
	if err := EnsureStreams(ctx, js, cfg); err != nil {
		t.Fatalf("EnsureStreams: %v", err)
	}
	if _, err := js.Publish(ctx, "rivalmix.in.cereal", []byte(`{}`)); err != nil {
		t.Fatalf("Publish: %v", err)
	}
	e.Shutdown()
	startTestServerAt(t, dir, port)
	deadline := time.Now().Add(10 * time.Second)
	for !nc.IsConnected() {
		if time.Now().After(deadline) {
			t.Fatalf("connection did not reconnect after the restart (status %v)", nc.Status())
		}
		time.Sleep(20 * time.Millisecond)
	}
	s, err := js.Stream(ctx, cfg.InputStream)
	if err != nil {
		t.Fatalf("Stream after restart: %v", err)
	}
	if n := s.CachedInfo().State.Msgs; n != 1 {
		t.Errorf("input stream holds %d messages after the restart, want 1", n)
	}
}

func TestStartEmbeddedErrors(t *testing.T) {
	t.Parallel()
	if _, err := StartEmbedded(context.Background(), EmbeddedConfig{}, nil); err == nil ||
		!strings.Contains(err.Error(), "StoreDir") {
		t.Errorf("empty StoreDir: err = %v, want one naming StoreDir", err)
	}
	if _, err := StartEmbedded(context.Background(), EmbeddedConfig{StoreDir: t.TempDir(), Port: 70000}, nil); err == nil ||
		!strings.Contains(err.Error(), "Port") {
		t.Errorf("port 70000: err = %v, want one naming Port", err)
	}

	// A port in use fails fast with the server's reason.
	first := startTestServer(t)
	ctx, cancel := context.WithTimeout(context.Background(), 15*time.Second)
	defer cancel()
	start := time.Now()
	e, err := StartEmbedded(ctx, EmbeddedConfig{StoreDir: t.TempDir(), Port: first.Port(), NoLog: true}, nil)
	if err == nil {
		e.Shutdown()
		t.Fatal("second server on a used port started")
	}
	if !strings.Contains(err.Error(), "listen") && !strings.Contains(err.Error(), "address already in use") {
		t.Errorf("port in use: err = %v, want the listen failure", err)
	}
	if d := time.Since(start); d > 5*time.Second {
		t.Errorf("port in use took %s to report, want well under the 10 s ready timeout", d)
	}
}
