package read

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
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
//	GET /                                                  dashboard: categories and their segments (HTML)
//	GET /categories/{category}                             dashboard: a category's figures and tables (HTML)
//	GET /categories/{category}/products/{product}          dashboard: one product (HTML)
//	GET /metrics                                           Prometheus metrics from reg
//	GET /healthz                                           200 "ok" while the process runs
//	GET /readyz                                            200 "ok" when ready() is nil, else 503 and the reason
//	GET /v1/categories                                     CategoriesResponse
//	GET /v1/categories/{category}/segments                 SegmentsResponse
//	GET /v1/categories/{category}/products/{product}       ProductView
//	GET /v1/categories/{category}/moves                    MovesResponse
//	GET /v1/categories/{category}/alerts                   AlertsResponse
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
	h := &httpAPI{views: views, lg: lg, pages: newPageCache()}
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
	mux.HandleFunc("GET /v1/categories/{category}/moves", func(w http.ResponseWriter, r *http.Request) {
		resp, err := views.ReadMoves(r.PathValue("category"))
		if err != nil {
			h.fail(w, err)
			return
		}
		h.json(w, http.StatusOK, resp)
	})
	mux.HandleFunc("GET /v1/categories/{category}/alerts", func(w http.ResponseWriter, r *http.Request) {
		resp, err := views.ReadAlerts(r.PathValue("category"))
		if err != nil {
			h.fail(w, err)
			return
		}
		h.json(w, http.StatusOK, resp)
	})
	mux.HandleFunc("GET /{$}", h.index)
	mux.HandleFunc("GET /categories/{category}", h.categoryPage)
	mux.HandleFunc("GET /categories/{category}/products/{product}", h.productPage)
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
	pages *pageCache
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
