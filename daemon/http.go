package daemon

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"strings"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// DefaultHTTPAddr is the default listen address of the HTTP server: loopback
// only, so that exposing the metrics and the live page is a deliberate act.
const DefaultHTTPAddr = "127.0.0.1:9731"

// HTTPOptions configures an [HTTPServer]. Gatherer and LastTick are
// required, and one of Period or Staleness.
type HTTPOptions struct {
	// Addr is the listen address; zero means DefaultHTTPAddr. Port 0 picks a
	// free port (see HTTPServer.Addr).
	Addr string

	// Gatherer is the registry served at /metrics.
	Gatherer prometheus.Gatherer

	// LastTick returns the start time of the latest tick of the tick loop,
	// or the zero time before the first. It is called on each /healthz
	// request, from the request's goroutine.
	LastTick func() time.Time

	// /healthz fails when no tick has started for Staleness, or, when
	// Staleness is zero, for 3 × Period (the shortest tick period of the
	// process).
	Period, Staleness time.Duration

	// Ready returns what keeps the daemon from being ready (for instance
	// "bus not connected", "gains invalid", "no tick yet"), nothing when it
	// is ready. Nil means ready once the first tick has started.
	Ready func() (missing []string)

	// Log receives errors of the metrics handler and of serving; nil means
	// none are logged.
	Log *slog.Logger
}

// HTTPServer serves /metrics, /healthz and /readyz, and whatever is added
// with [HTTPServer.Handle] (the live page at /). The constructor starts no
// goroutine and opens no socket: Listen binds the address, Serve serves
// until its context is done.
//
//   - /healthz is 200 while the tick loop advances and 503 when it has
//     stalled. A bus outage does not fail it: restarting the daemon would not
//     bring the bus back, and the estimator keeps coasting meanwhile.
//   - /readyz is 200 only when Ready reports nothing missing; otherwise 503
//     with one missing item per line.
type HTTPServer struct {
	opts    HTTPOptions
	limit   time.Duration
	created time.Time
	mux     *http.ServeMux
	srv     *http.Server
	log     *slog.Logger

	mu sync.Mutex
	ln net.Listener
}

// NewHTTPServer checks opts and returns a server that is not yet listening.
func NewHTTPServer(opts HTTPOptions) (*HTTPServer, error) {
	if opts.Gatherer == nil {
		return nil, errors.New("http server: no metrics gatherer")
	}
	if opts.LastTick == nil {
		return nil, errors.New("http server: no LastTick function for /healthz")
	}
	if opts.Period < 0 || opts.Staleness < 0 {
		return nil, fmt.Errorf("http server: negative period %v or staleness %v", opts.Period, opts.Staleness)
	}
	limit := opts.Staleness
	if limit == 0 {
		limit = 3 * opts.Period
	}
	if limit == 0 {
		return nil, errors.New("http server: neither a tick period nor a staleness limit for /healthz")
	}
	if opts.Addr == "" {
		opts.Addr = DefaultHTTPAddr
	}
	log := opts.Log
	if log == nil {
		log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	h := &HTTPServer{opts: opts, limit: limit, created: time.Now(), mux: http.NewServeMux(), log: log}
	h.mux.Handle("GET /metrics", promhttp.HandlerFor(opts.Gatherer, promhttp.HandlerOpts{
		ErrorLog:      slog.NewLogLogger(log.Handler(), slog.LevelError),
		ErrorHandling: promhttp.ContinueOnError,
	}))
	h.mux.HandleFunc("GET /healthz", h.healthz)
	h.mux.HandleFunc("GET /readyz", h.readyz)
	h.srv = &http.Server{
		Handler:           h.mux,
		ReadHeaderTimeout: 5 * time.Second,
		IdleTimeout:       time.Minute,
		// No WriteTimeout: the live page may stream.
		ErrorLog: slog.NewLogLogger(log.Handler(), slog.LevelWarn),
	}
	return h, nil
}

// Handle registers handler for pattern (http.ServeMux syntax, e.g.
// "GET /{$}" for the root page only). It may be called before or while
// serving; a pattern that conflicts with a registered one panics, as with
// http.ServeMux.
func (h *HTTPServer) Handle(pattern string, handler http.Handler) { h.mux.Handle(pattern, handler) }

// Handler returns the server's handler, for tests and for embedding it in
// another server.
func (h *HTTPServer) Handler() http.Handler { return h.mux }

// Listen binds the listen address, so that an address in use is reported at
// start-up rather than from a goroutine.
func (h *HTTPServer) Listen() error {
	h.mu.Lock()
	defer h.mu.Unlock()
	if h.ln != nil {
		return errors.New("http server: already listening")
	}
	ln, err := net.Listen("tcp", h.opts.Addr)
	if err != nil {
		return fmt.Errorf("http server: %w", err)
	}
	h.ln = ln
	return nil
}

// Addr returns the bound address (with the port picked for port 0), or nil
// before Listen.
func (h *HTTPServer) Addr() net.Addr {
	h.mu.Lock()
	defer h.mu.Unlock()
	if h.ln == nil {
		return nil
	}
	return h.ln.Addr()
}

// httpShutdownGrace is how long requests in flight get to finish at a stop;
// what is still open then (a live page's event stream, a slow scrape) is
// closed, and logged, so that a requested stop is quick.
const httpShutdownGrace = 500 * time.Millisecond

// Serve serves on the address bound by Listen until ctx is done, then
// shuts down — new connections are refused, requests in flight get
// httpShutdownGrace to finish, the rest are closed and logged — and returns
// nil. It returns an error if serving
// fails or Listen was not called. Its shape fits [Group.Go].
func (h *HTTPServer) Serve(ctx context.Context) error {
	h.mu.Lock()
	ln := h.ln
	h.mu.Unlock()
	if ln == nil {
		return errors.New("http server: Serve before Listen")
	}
	errc := make(chan error, 1)
	go func() { errc <- h.srv.Serve(ln) }() // ends before Serve returns
	select {
	case err := <-errc:
		if errors.Is(err, http.ErrServerClosed) {
			return nil
		}
		return fmt.Errorf("http server: %w", err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.Background(), httpShutdownGrace)
	defer cancel()
	if err := h.srv.Shutdown(sctx); err != nil {
		h.log.Info("http server: closing the connections still open at the stop (live page streams, slow requests)", "after", httpShutdownGrace, "reason", err)
		h.srv.Close()
	}
	<-errc
	return nil
}

func writeText(w http.ResponseWriter, code int, body string) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(code)
	io.WriteString(w, body)
}

func (h *HTTPServer) healthz(w http.ResponseWriter, _ *http.Request) {
	last := h.opts.LastTick()
	since := "start-up"
	if last.IsZero() {
		last = h.created // no tick yet: the loop has limit to begin
	} else {
		since = "the last tick"
	}
	age := time.Since(last)
	if age > h.limit {
		writeText(w, http.StatusServiceUnavailable,
			fmt.Sprintf("stalled: %v since %s, limit %v\n", age.Round(time.Millisecond), since, h.limit))
		return
	}
	writeText(w, http.StatusOK, fmt.Sprintf("ok: %v since %s\n", age.Round(time.Millisecond), since))
}

func (h *HTTPServer) readyz(w http.ResponseWriter, _ *http.Request) {
	var missing []string
	if h.opts.Ready != nil {
		missing = h.opts.Ready()
	} else if h.opts.LastTick().IsZero() {
		missing = []string{"no tick yet"}
	}
	if len(missing) == 0 {
		writeText(w, http.StatusOK, "ready\n")
		return
	}
	writeText(w, http.StatusServiceUnavailable, "not ready:\n- "+strings.Join(missing, "\n- ")+"\n")
}
