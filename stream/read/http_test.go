package read

import (
	"context"
	"encoding/json"
	"errors"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil/promlint"

	"rivalmix/stream/category"
)

func TestHTTPHandler(t *testing.T) {
	t.Parallel()
	reg := testRegistry(t)
	var notReady atomic.Pointer[error]
	ready := func() error {
		if p := notReady.Load(); p != nil {
			return *p
		}
		return nil
	}
	h := NewHTTPHandler(testViews(), reg, ready, testLogger(t))

	get := func(path string) *httptest.ResponseRecorder {
		t.Helper()
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, path, nil))
		return rec
	}
	tests := []struct {
		path        string
		code        int
		contentType string
		contains    []string
	}{
		{"/healthz", 200, "text/plain", []string{"ok"}},
		{"/readyz", 200, "text/plain", []string{"ok"}},
		{"/v1/categories", 200, "application/json", []string{`"categories":[{"name":"cereal"`}},
		{"/v1/categories/cereal/segments", 200, "application/json",
			[]string{`"category":"cereal"`, `"refit":"2026-W48"`, `"id":"S2"`, `"medians":[0.5,null,null]`}},
		{"/v1/categories/cereal/products/A", 200, "application/json", []string{`"product":"A"`, `"segment":"S1"`}},
		{"/v1/categories/cereal/products/%3Ci%3EE%3C%2Fi%3E", 200, "application/json", []string{`"median":null`}},
		{"/v1/categories/nope/segments", 404, "application/json", []string{`{"error":"category \"nope\": not found`}},
		{"/v1/categories/cereal/products/Z", 404, "application/json", []string{`"error":"product \"Z\" in category \"cereal\": not found"`}},
		{"/v1/nothing", 404, "application/json", []string{`"error":"no such endpoint: GET /v1/nothing"`}},
		{"/metrics", 200, "text/plain", []string{`rivalmix_segments{category="cereal"} 3`}},
		{"/", 200, "text/html", []string{"<h2>cereal</h2>", "S5", "&lt;i&gt;E&lt;/i&gt;", "not pricing advice", "5 products · 3 segments"}},
	}
	for _, tt := range tests {
		rec := get(tt.path)
		if rec.Code != tt.code {
			t.Errorf("GET %s: status %d, want %d; body %s", tt.path, rec.Code, tt.code, rec.Body)
			continue
		}
		if ct := rec.Header().Get("Content-Type"); !strings.HasPrefix(ct, tt.contentType) {
			t.Errorf("GET %s: Content-Type %q, want %s", tt.path, ct, tt.contentType)
		}
		body := rec.Body.String()
		for _, s := range tt.contains {
			if !strings.Contains(body, s) {
				t.Errorf("GET %s: body lacks %s:\n%s", tt.path, s, body)
			}
		}
		if tt.path == "/" && strings.Contains(body, "<i>E</i>") {
			t.Error("dashboard shows a product id unescaped")
		}
		if tt.path == "/" && strings.Contains(body, "No refit") {
			t.Error("dashboard says no refit has completed while it shows one")
		}
		if tt.contentType == "application/json" && !json.Valid(rec.Body.Bytes()) {
			t.Errorf("GET %s: invalid JSON %s", tt.path, body)
		}
	}

	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequest(http.MethodPost, "/v1/categories", nil))
	if rec.Code != http.StatusMethodNotAllowed {
		t.Errorf("POST /v1/categories: status %d, want 405", rec.Code)
	}

	reason := errors.New("state file not open")
	notReady.Store(&reason)
	rec = get("/readyz")
	if rec.Code != http.StatusServiceUnavailable || !strings.Contains(rec.Body.String(), "state file not open") {
		t.Errorf("/readyz when not ready: %d %q", rec.Code, rec.Body)
	}

	empty := NewHTTPHandler(NewViews(), nil, nil, nil)
	rec = httptest.NewRecorder()
	empty.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, "/", nil))
	if rec.Code != 200 || !strings.Contains(rec.Body.String(), "No refit has completed yet") {
		t.Errorf("empty dashboard: %d %s", rec.Code, rec.Body)
	}
}

// TestHTTPServe runs the read surface on a real loopback listener and
// shuts it down through its context.
func TestHTTPServe(t *testing.T) {
	t.Parallel()
	ln, err := Listen("127.0.0.1:0")
	if err != nil {
		t.Fatalf("Listen: %v", err)
	}
	reg := testRegistry(t)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan error, 1)
	go func() { done <- Serve(ctx, ln, NewHTTPHandler(testViews(), reg, nil, testLogger(t)), testLogger(t)) }()

	base := "http://" + ln.Addr().String()
	client := &http.Client{Timeout: 5 * time.Second}
	fetch := func(path string) (int, string) {
		t.Helper()
		resp, err := client.Get(base + path)
		if err != nil {
			t.Fatalf("GET %s: %v", path, err)
		}
		defer resp.Body.Close()
		b, err := io.ReadAll(resp.Body)
		if err != nil {
			t.Fatalf("GET %s body: %v", path, err)
		}
		return resp.StatusCode, string(b)
	}

	code, body := fetch("/v1/categories")
	var cats CategoriesResponse
	if code != 200 || json.Unmarshal([]byte(body), &cats) != nil || len(cats.Categories) != 1 || cats.Categories[0].Products != 5 {
		t.Errorf("/v1/categories: %d %s", code, body)
	}
	code, body = fetch("/v1/categories/cereal/products/D")
	var p category.ProductView
	if code != 200 || json.Unmarshal([]byte(body), &p) != nil || p.Segment != "S1" || p.Last == nil || p.Last.Seq != 7 {
		t.Errorf("/v1/categories/cereal/products/D: %d %s", code, body)
	}
	code, body = fetch("/metrics")
	if code != 200 {
		t.Fatalf("/metrics: %d", code)
	}
	problems, err := promlint.New(strings.NewReader(body)).Lint()
	if err != nil {
		t.Fatalf("promlint: %v", err)
	}
	for _, pr := range problems {
		t.Errorf("/metrics lint: %s: %s", pr.Metric, pr.Text)
	}
	for _, want := range []string{`rivalmix_segments{category="cereal"} 3`} {
		if !strings.Contains(body, want) {
			t.Errorf("/metrics lacks %q", want)
		}
	}
	if code, _ := fetch("/healthz"); code != 200 {
		t.Errorf("/healthz: %d", code)
	}

	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("Serve returned %v after cancel, want nil", err)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("Serve did not return after cancel")
	}
	if _, err := client.Get(base + "/healthz"); err == nil {
		t.Error("server still answers after shutdown")
	}
}

func TestListenError(t *testing.T) {
	t.Parallel()
	ln, err := Listen("127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	if _, err := Listen(ln.Addr().String()); err == nil || !strings.Contains(err.Error(), ln.Addr().String()) {
		t.Errorf("Listen on a used address: %v, want an error naming it", err)
	}
}

// testRegistry holds one gauge shaped like the service's segment gauge,
// so that /metrics has something of rivalmix's to serve.
func testRegistry(t *testing.T) *prometheus.Registry {
	t.Helper()
	reg := prometheus.NewRegistry()
	g := prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "rivalmix_segments", Help: "Segments at the last refit."}, []string{"category"})
	reg.MustRegister(g)
	g.WithLabelValues("cereal").Set(3)
	return reg
}

// testLogger sends log lines to the test's output.
func testLogger(t *testing.T) *slog.Logger {
	return slog.New(slog.NewTextHandler(t.Output(), &slog.HandlerOptions{Level: slog.LevelDebug}))
}
