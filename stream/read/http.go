package read

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"html/template"
	"log/slog"
	"net"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"rivalmix/alerts"
	"rivalmix/stream/category"
)

// httpShutdownTimeout bounds how long Serve waits for requests in flight
// once its context ends.
const httpShutdownTimeout = 5 * time.Second

// Listen opens the TCP listener for the HTTP read surface. Tests pass
// "127.0.0.1:0" and read the port from the listener's address.
func Listen(addr string) (net.Listener, error) {
	ln, err := net.Listen("tcp", addr)
	if err != nil {
		return nil, fmt.Errorf("read: http listen address %q: %w", addr, err)
	}
	return ln, nil
}

// Serve serves h on ln until ctx ends, then shuts the server down,
// waiting at most five seconds (on a fresh context, since ctx is already
// done) for requests in flight, and returns nil. It returns the error
// when the server stops for another reason. ln is closed on return.
func Serve(ctx context.Context, ln net.Listener, h http.Handler, lg *slog.Logger) error {
	if lg == nil {
		lg = slog.New(slog.DiscardHandler)
	}
	srv := &http.Server{
		Handler:           h,
		ReadHeaderTimeout: 5 * time.Second,
		ReadTimeout:       10 * time.Second,
		WriteTimeout:      30 * time.Second,
		IdleTimeout:       time.Minute,
		ErrorLog:          slog.NewLogLogger(lg.Handler(), slog.LevelWarn),
	}
	errc := make(chan error, 1)
	go func() { errc <- srv.Serve(ln) }()
	select {
	case err := <-errc:
		return fmt.Errorf("read: http serve on %s: %w", ln.Addr(), err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.Background(), httpShutdownTimeout)
	defer cancel()
	if err := srv.Shutdown(sctx); err != nil {
		lg.Warn("http shutdown did not finish; closing", "addr", ln.Addr().String(), "err", err)
		_ = srv.Close()
	}
	if err := <-errc; err != nil && !errors.Is(err, http.ErrServerClosed) {
		return fmt.Errorf("read: http serve on %s: %w", ln.Addr(), err)
	}
	return nil
}

// NewHTTPHandler returns the HTTP read surface:
//
//	GET /                                                  dashboard page (HTML)
//	GET /metrics                                           Prometheus metrics from reg
//	GET /healthz                                           200 "ok" while the process runs
//	GET /readyz                                            200 "ok" when ready() is nil, else 503 and the reason
//	GET /v1/categories                                     CategoriesResponse
//	GET /v1/categories/{category}/segments                 SegmentsResponse
//	GET /v1/categories/{category}/products/{product}       ProductView
//
// Errors of the JSON API are ErrorResponse bodies: 404 for an unknown
// category, product or path, 405 for a method other than GET or HEAD. A nil ready means always ready; a
// nil reg serves an empty registry. lg receives the errors of writing a
// response (nil discards them).
func NewHTTPHandler(views *Views, reg prometheus.Gatherer, ready func() error, lg *slog.Logger) http.Handler {
	if lg == nil {
		lg = slog.New(slog.DiscardHandler)
	}
	if reg == nil {
		reg = prometheus.NewRegistry()
	}
	if ready == nil {
		ready = func() error { return nil }
	}
	h := &httpAPI{views: views, lg: lg}
	mux := http.NewServeMux()
	mux.Handle("GET /metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{
		ErrorLog:      slog.NewLogLogger(lg.Handler(), slog.LevelError),
		ErrorHandling: promhttp.ContinueOnError,
	}))
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, r *http.Request) {
		h.text(w, http.StatusOK, "ok\n")
	})
	mux.HandleFunc("GET /readyz", func(w http.ResponseWriter, r *http.Request) {
		if err := ready(); err != nil {
			h.text(w, http.StatusServiceUnavailable, "not ready: "+err.Error()+"\n")
			return
		}
		h.text(w, http.StatusOK, "ok\n")
	})
	mux.HandleFunc("GET /v1/categories", func(w http.ResponseWriter, r *http.Request) {
		h.json(w, http.StatusOK, views.ReadCategories())
	})
	mux.HandleFunc("GET /v1/categories/{category}/segments", func(w http.ResponseWriter, r *http.Request) {
		resp, err := views.ReadSegments(r.PathValue("category"))
		if err != nil {
			h.fail(w, err)
			return
		}
		h.json(w, http.StatusOK, resp)
	})
	mux.HandleFunc("GET /v1/categories/{category}/products/{product}", func(w http.ResponseWriter, r *http.Request) {
		resp, err := views.ReadProduct(r.PathValue("category"), r.PathValue("product"))
		if err != nil {
			h.fail(w, err)
			return
		}
		h.json(w, http.StatusOK, resp)
	})
	mux.HandleFunc("GET /{$}", h.dashboard)
	mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		// The catch-all also receives other methods on the GET paths;
		// those are 405, not 404.
		probe := r.Clone(r.Context())
		probe.Method = http.MethodGet
		if _, pattern := mux.Handler(probe); pattern != "/" {
			w.Header().Set("Allow", "GET, HEAD")
			h.json(w, http.StatusMethodNotAllowed, ErrorResponse{Error: fmt.Sprintf("method %s not allowed on %s", r.Method, r.URL.Path)})
			return
		}
		h.json(w, http.StatusNotFound, ErrorResponse{Error: fmt.Sprintf("no such endpoint: %s %s", r.Method, r.URL.Path)})
	})
	return mux
}

type httpAPI struct {
	views *Views
	lg    *slog.Logger
}

func (h *httpAPI) text(w http.ResponseWriter, code int, body string) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(code)
	if _, err := w.Write([]byte(body)); err != nil {
		h.lg.Debug("http write", "err", err)
	}
}

func (h *httpAPI) json(w http.ResponseWriter, code int, v any) {
	body, err := json.Marshal(v)
	if err != nil {
		h.lg.Error("http encode response", "err", err)
		code = http.StatusInternalServerError
		body, _ = json.Marshal(ErrorResponse{Error: "cannot encode the response"})
	}
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(code)
	body = append(body, '\n')
	if _, err := w.Write(body); err != nil {
		h.lg.Debug("http write", "err", err)
	}
}

func (h *httpAPI) fail(w http.ResponseWriter, err error) {
	code := http.StatusInternalServerError
	if errors.Is(err, ErrNotFound) {
		code = http.StatusNotFound
	}
	h.json(w, code, ErrorResponse{Error: err.Error()})
}

// dashboardMembers is how many members of a segment the page lists.
const dashboardMembers = 12

type dashboardSegment struct {
	category.SegmentView
	Shown []string
	More  int
}

type dashboardCategory struct {
	category.CategoryView
	Segments []dashboardSegment
}

func (h *httpAPI) dashboard(w http.ResponseWriter, r *http.Request) {
	var page struct{ Categories []dashboardCategory }
	for _, c := range h.views.Categories() {
		dc := dashboardCategory{CategoryView: c}
		if segs, ok := h.views.Segments(c.Name); ok {
			for _, s := range segs {
				ds := dashboardSegment{SegmentView: s, Shown: s.Members}
				if len(s.Members) > dashboardMembers {
					ds.Shown, ds.More = s.Members[:dashboardMembers], len(s.Members)-dashboardMembers
				}
				dc.Segments = append(dc.Segments, ds)
			}
		}
		page.Categories = append(page.Categories, dc)
	}
	var b strings.Builder
	if err := dashboardPage.Execute(&b, page); err != nil {
		h.lg.Error("http render dashboard", "err", err)
		h.text(w, http.StatusInternalServerError, "cannot render the dashboard\n")
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	if _, err := w.Write([]byte(b.String())); err != nil {
		h.lg.Debug("http write", "err", err)
	}
}

// num formats a view number for the page: three significant digits, or a
// dash when it is not defined.
func num(f alerts.Float) string {
	if !f.Defined() {
		return "–"
	}
	return strconv.FormatFloat(float64(f), 'g', 3, 64)
}

var dashboardPage = template.Must(template.New("dashboard").Funcs(template.FuncMap{"num": num, "pathEscape": url.PathEscape,
	"caution": func() string { return alerts.Caution }}).Parse(`<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta http-equiv="refresh" content="10">
<title>rivalmix</title>
<style>
body { font: 14px/1.4 system-ui, sans-serif; margin: 2em; color: #222; }
h1 { font-size: 1.4em; } h2 { font-size: 1.15em; margin-top: 2em; }
table { border-collapse: collapse; } th, td { padding: .25em .8em; border-bottom: 1px solid #ddd; text-align: left; vertical-align: top; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
.meta { color: #666; }
</style>
</head>
<body>
<h1>rivalmix segments</h1>
<p class="meta">Segments of each category by how fast the relative cross-elasticities of its products' strongest competitors decay. JSON: <a href="/v1/categories">/v1/categories</a>; metrics: <a href="/metrics">/metrics</a>.</p>
<p><strong>{{caution}}</strong></p>
{{range .Categories}}{{$cat := .Name}}
<h2>{{.Name}}</h2>
<p class="meta">refit {{.LastRefit}} · {{.Products}} products · {{.CategoryView.Segments}} segments · ESS {{num .ESS}} · mean surprise {{num .MeanSurprise}} nats · {{.Events}} events</p>
<table>
<tr><th>segment</th><th>size</th><th>median 1st</th><th>median 2nd</th><th>median 3rd</th><th>reported</th><th>members</th></tr>
{{range .Segments}}<tr><td>{{.ID}}</td><td class="n">{{.Size}}</td><td class="n">{{num (index .Medians 0)}}</td><td class="n">{{num (index .Medians 1)}}</td><td class="n">{{num (index .Medians 2)}}</td><td class="n">{{num .MeanReported}}</td><td>{{range $i, $m := .Shown}}{{if $i}}, {{end}}<a href="/v1/categories/{{pathEscape $cat}}/products/{{pathEscape $m}}">{{$m}}</a>{{end}}{{if .More}} and {{.More}} more{{end}}</td></tr>
{{end}}</table>
{{else}}
<p>No refit has completed yet.</p>
{{end}}
</body>
</html>
`))
