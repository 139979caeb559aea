package main

import (
	"context"
	"flag"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/nats-io/nkeys"

	"rivalmix/stream"
)

// TestSimulateConnectsWithNKey: simulate takes the connection options of
// serve, and publishes to a server that admits only an NKey user.
func TestSimulateConnectsWithNKey(t *testing.T) {
	t.Parallel()
	user, err := nkeys.CreateUser()
	if err != nil {
		t.Fatal(err)
	}
	pub, err := user.PublicKey()
	if err != nil {
		t.Fatal(err)
	}
	seed, err := user.Seed()
	if err != nil {
		t.Fatal(err)
	}
	seedFile := filepath.Join(t.TempDir(), "user.nk")
	if err := os.WriteFile(seedFile, seed, 0o600); err != nil {
		t.Fatal(err)
	}
	srv, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, NoSigs: true, NoLog: true,
		JetStream: true, StoreDir: t.TempDir(), Nkeys: []*server.NkeyUser{{Nkey: pub}}})
	if err != nil {
		t.Fatal(err)
	}
	go srv.Start()
	t.Cleanup(func() { srv.Shutdown(); srv.WaitForShutdown() })
	if !srv.ReadyForConnections(10 * time.Second) {
		t.Fatal("nats-server not ready within 10 s")
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	nc, err := stream.Connect(ctx, srv.ClientURL(), stream.ConnectOptions{NKeyFile: seedFile}, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	bus := stream.DefaultBusConfig()
	if err := stream.CreateStreams(ctx, js, bus); err != nil {
		t.Fatal(err)
	}

	code, _, stderr := runLine(t, "simulate", "--nats", srv.ClientURL(), "--nkey", seedFile, "--products", "5", "--category", "breakfast-cereal")
	if code != 0 {
		t.Fatalf("simulate: exit %d: %s", code, stderr)
	}
	s, err := js.Stream(ctx, bus.InputStream)
	if err != nil {
		t.Fatal(err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if info.State.Msgs != 6 { // five products and the refit-complete
		t.Errorf("input stream holds %d messages, want 6", info.State.Msgs)
	}
}

// TestSimulateHasServeConnectionFlags: every connection flag of serve is
// also one of simulate.
func TestSimulateHasServeConnectionFlags(t *testing.T) {
	t.Parallel()
	var conn stream.ConnectOptions
	names := flag.NewFlagSet("conn", flag.ContinueOnError)
	connFlags(names, &conn)
	serve := newFlagSet("serve", "", "", io.Discard)
	var f serviceFlags
	f.register(serve, "rivalmix.db", "127.0.0.1:4222")
	_, stderr, _ := execute(t, "simulate", "-h")
	names.VisitAll(func(fl *flag.Flag) {
		if serve.Lookup(fl.Name) == nil {
			t.Errorf("serve lacks --%s", fl.Name)
		}
		if !strings.Contains(stderr, "\n  -"+fl.Name+" ") {
			t.Errorf("simulate -h lacks --%s", fl.Name)
		}
	})
}
