package read

import (
	"encoding/json"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"
)

func TestMicro(t *testing.T) {
	t.Parallel()
	url := startNATS(t)
	nc := connectNATS(t, url)
	views := testViews()
	svc, err := StartMicro(nc, views)
	if err != nil {
		t.Fatalf("StartMicro: %v", err)
	}
	t.Cleanup(func() {
		if err := svc.Stop(); err != nil {
			t.Errorf("Stop: %v", err)
		}
	})
	info := svc.Info()
	if info.Name != "rivalmix" || len(info.Endpoints) != 3 {
		t.Errorf("service info %+v", info)
	}

	// A second connection plays the client, as another process would.
	client := connectNATS(t, url)
	request := func(subject string, body []byte) *nats.Msg {
		t.Helper()
		msg, err := client.Request(subject, body, 5*time.Second)
		if err != nil {
			t.Fatalf("request %s: %v", subject, err)
		}
		return msg
	}
	same := func(subject string, got []byte, want any) {
		t.Helper()
		if w := mustJSON(t, want); string(got) != w {
			t.Errorf("%s reply\n got %s\nwant %s", subject, got, w)
		}
	}

	msg := request("rivalmix.read.categories", nil)
	same("categories", msg.Data, views.ReadCategories())

	msg = request("rivalmix.read.segments", []byte("cereal"))
	segs, err := views.ReadSegments("cereal")
	if err != nil {
		t.Fatal(err)
	}
	same("segments", msg.Data, segs)

	body, _ := json.Marshal(ProductRequest{Category: "cereal", Product: "C"})
	msg = request("rivalmix.read.product", body)
	p, err := views.ReadProduct("cereal", "C")
	if err != nil {
		t.Fatal(err)
	}
	same("product", msg.Data, p)

	for _, tt := range []struct {
		subject string
		body    string
		code    string
	}{
		{"rivalmix.read.segments", "nope", "404"},
		{"rivalmix.read.segments", "", "400"},
		{"rivalmix.read.product", `{"category":"cereal","product":"Z"}`, "404"},
		{"rivalmix.read.product", `{"category":"nope","product":"A"}`, "404"},
		{"rivalmix.read.product", `{"category":"cereal"}`, "400"},
		{"rivalmix.read.product", `not json`, "400"},
	} {
		msg := request(tt.subject, []byte(tt.body))
		if got := msg.Header.Get(micro.ErrorCodeHeader); got != tt.code {
			t.Errorf("%s %q: error code %q, want %s (description %q)", tt.subject, tt.body, got, tt.code,
				msg.Header.Get(micro.ErrorHeader))
		}
		if msg.Header.Get(micro.ErrorHeader) == "" {
			t.Errorf("%s %q: no error description", tt.subject, tt.body)
		}
	}

	if _, err := StartMicro(nil, views); err == nil {
		t.Error("StartMicro with no connection succeeded")
	}
}

// startNATS starts an embedded nats-server on a random loopback port and
// shuts it down when the test ends; a server that does not start fails
// the test.
func startNATS(t *testing.T) string {
	t.Helper()
	srv, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, NoSigs: true, NoLog: true,
		StoreDir: t.TempDir()})
	if err != nil {
		t.Fatalf("nats-server: %v", err)
	}
	go srv.Start()
	t.Cleanup(func() {
		srv.Shutdown()
		srv.WaitForShutdown()
	})
	if !srv.ReadyForConnections(10 * time.Second) {
		t.Fatal("nats-server not ready within 10 s")
	}
	return srv.ClientURL()
}

func connectNATS(t *testing.T, url string) *nats.Conn {
	t.Helper()
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatalf("connect %s: %v", url, err)
	}
	t.Cleanup(nc.Close)
	return nc
}
