package daemon

import (
	"context"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
)

// get requests path from h and returns the status and body.
func get(t *testing.T, h http.Handler, path string) (int, string) {
	t.Helper()
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, httptest.NewRequest(http.MethodGet, path, nil))
	return rec.Code, rec.Body.String()
}

func TestHealthz(t *testing.T) {
	const period = 100 * time.Millisecond // limit 3 × period = 300 ms
	for _, tc := range []struct {
		name      string
		age       time.Duration // of the last tick; -1 for none yet
		staleness time.Duration
		code      int
	}{
		{"fresh tick", 0, 0, http.StatusOK},
		{"within three periods", 200 * time.Millisecond, 0, http.StatusOK},
		{"beyond three periods", 400 * time.Millisecond, 0, http.StatusServiceUnavailable},
		{"long ago", time.Hour, 0, http.StatusServiceUnavailable},
		{"no tick yet, just started", -1, 0, http.StatusOK},
		{"staleness overrides the period", time.Second, 2 * time.Second, http.StatusOK},
		{"beyond the staleness", 3 * time.Second, 2 * time.Second, http.StatusServiceUnavailable},
	} {
		t.Run(tc.name, func(t *testing.T) {
			h, err := NewHTTPServer(HTTPOptions{
				Gatherer: prometheus.NewRegistry(),
				LastTick: func() time.Time {
					if tc.age < 0 {
						return time.Time{}
					}
					return time.Now().Add(-tc.age)
				},
				Period:    period,
				Staleness: tc.staleness,
				// A bus outage must not fail /healthz.
				Ready: func() []string { return []string{"bus not connected"} },
			})
			if err != nil {
				t.Fatal(err)
			}
			code, body := get(t, h.Handler(), "/healthz")
			if code != tc.code {
				t.Errorf("/healthz = %d %q, want %d", code, body, tc.code)
			}
		})
	}
}

func TestHealthzStallsWithoutFirstTick(t *testing.T) {
	h, err := NewHTTPServer(HTTPOptions{
		Gatherer:  prometheus.NewRegistry(),
		LastTick:  func() time.Time { return time.Time{} },
		Staleness: time.Millisecond,
	})
	if err != nil {
		t.Fatal(err)
	}
	// The loop never ticks: /healthz fails once the limit has passed since
	// the server was created.
	checkFor(t, 5*time.Second, time.Millisecond, func() error {
		if code, body := get(t, h.Handler(), "/healthz"); code != http.StatusServiceUnavailable {
			return &httpStatusError{code, body}
		}
		return nil
	})
}

type httpStatusError struct {
	code int
	body string
}

func (e *httpStatusError) Error() string { return http.StatusText(e.code) + ": " + e.body }

func TestReadyz(t *testing.T) {
	var missing atomic.Pointer[[]string]
	var ticked atomic.Bool
	lastTick := func() time.Time {
		if ticked.Load() {
			return time.Now()
		}
		return time.Time{}
	}
	withReady, err := NewHTTPServer(HTTPOptions{
		Gatherer: prometheus.NewRegistry(), LastTick: lastTick, Period: time.Second,
		Ready: func() []string { return *missing.Load() },
	})
	if err != nil {
		t.Fatal(err)
	}
	noReady, err := NewHTTPServer(HTTPOptions{Gatherer: prometheus.NewRegistry(), LastTick: lastTick, Period: time.Second})
	if err != nil {
		t.Fatal(err)
	}

	missing.Store(&[]string{"bus not connected", "no tick yet"})
	code, body := get(t, withReady.Handler(), "/readyz")
	if code != http.StatusServiceUnavailable || body != "not ready:\n- bus not connected\n- no tick yet\n" {
		t.Errorf("/readyz = %d %q, want 503 listing both", code, body)
	}
	missing.Store(&[]string{})
	if code, body := get(t, withReady.Handler(), "/readyz"); code != http.StatusOK || body != "ready\n" {
		t.Errorf("/readyz = %d %q, want 200 ready", code, body)
	}

	// Without a Ready function: ready once the first tick has started.
	if code, body := get(t, noReady.Handler(), "/readyz"); code != http.StatusServiceUnavailable || !strings.Contains(body, "no tick yet") {
		t.Errorf("/readyz before the first tick = %d %q, want 503", code, body)
	}
	ticked.Store(true)
	if code, _ := get(t, noReady.Handler(), "/readyz"); code != http.StatusOK {
		t.Errorf("/readyz after the first tick = %d, want 200", code)
	}
}

func TestHTTPMetricsAndHandle(t *testing.T) {
	reg := prometheus.NewPedanticRegistry()
	m := NewMetrics(reg)
	m.SetBusConnected(true)
	h, err := NewHTTPServer(HTTPOptions{Gatherer: reg, LastTick: time.Now, Period: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	h.Handle("GET /{$}", http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		io.WriteString(w, "live page")
	}))
	if code, body := get(t, h.Handler(), "/metrics"); code != http.StatusOK || !strings.Contains(body, "surmise_bus_connected 1\n") {
		t.Errorf("/metrics = %d, body without surmise_bus_connected 1:\n%s", code, body)
	}
	if code, body := get(t, h.Handler(), "/"); code != http.StatusOK || body != "live page" {
		t.Errorf("/ = %d %q, want the added page", code, body)
	}
	if code, _ := get(t, h.Handler(), "/nothing-here"); code != http.StatusNotFound {
		t.Errorf("/nothing-here = %d, want 404", code)
	}
	rec := httptest.NewRecorder()
	h.Handler().ServeHTTP(rec, httptest.NewRequest(http.MethodPost, "/healthz", nil))
	if rec.Code != http.StatusMethodNotAllowed {
		t.Errorf("POST /healthz = %d, want 405", rec.Code)
	}
}

func TestHTTPServerRealListener(t *testing.T) {
	h, err := NewHTTPServer(HTTPOptions{
		Addr: "127.0.0.1:0", Gatherer: prometheus.NewRegistry(), LastTick: time.Now, Period: time.Second,
	})
	if err != nil {
		t.Fatal(err)
	}
	if h.Addr() != nil {
		t.Error("Addr before Listen is not nil")
	}
	if err := h.Serve(context.Background()); err == nil {
		t.Error("Serve before Listen returned nil")
	}
	if err := h.Listen(); err != nil {
		t.Fatal(err)
	}
	if err := h.Listen(); err == nil {
		t.Error("second Listen succeeded")
	}
	url := "http://" + h.Addr().String()

	// The same address again is taken: reported by Listen, not later.
	busy, err := NewHTTPServer(HTTPOptions{Addr: h.Addr().String(), Gatherer: prometheus.NewRegistry(), LastTick: time.Now, Period: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	if err := busy.Listen(); err == nil {
		t.Error("Listen on a bound address succeeded")
	}

	g := NewGroup(context.Background())
	g.Go("http", h.Serve)
	resp, err := http.Get(url + "/healthz")
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != http.StatusOK || !strings.HasPrefix(string(body), "ok: ") {
		t.Errorf("GET /healthz = %d %q", resp.StatusCode, body)
	}
	if err := g.Stop(); err != nil {
		t.Fatalf("Serve returned %v after its context was cancelled", err)
	}
	http.DefaultClient.CloseIdleConnections()
	if _, err := http.Get(url + "/healthz"); err == nil {
		t.Error("server still answers after Serve returned")
	}
}

func TestNewHTTPServerErrors(t *testing.T) {
	reg := prometheus.NewRegistry()
	for _, tc := range []struct {
		name string
		opts HTTPOptions
		want string
	}{
		{"no gatherer", HTTPOptions{LastTick: time.Now, Period: time.Second}, "gatherer"},
		{"no LastTick", HTTPOptions{Gatherer: reg, Period: time.Second}, "LastTick"},
		{"no period", HTTPOptions{Gatherer: reg, LastTick: time.Now}, "period"},
		{"negative staleness", HTTPOptions{Gatherer: reg, LastTick: time.Now, Staleness: -time.Second}, "negative"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := NewHTTPServer(tc.opts)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("NewHTTPServer = %v, want an error mentioning %q", err, tc.want)
			}
		})
	}
	h, err := NewHTTPServer(HTTPOptions{Gatherer: reg, LastTick: time.Now, Period: time.Second})
	if err != nil {
		t.Fatal(err)
	}
	if h.opts.Addr != DefaultHTTPAddr {
		t.Errorf("default address %q, want %q", h.opts.Addr, DefaultHTTPAddr)
	}
}

func ExampleHTTPServer() {
	reg := prometheus.NewRegistry()
	var lastTick atomic.Int64 // the tick loop stores time.Now().UnixNano()
	h, err := NewHTTPServer(HTTPOptions{
		Addr:     "127.0.0.1:0",
		Gatherer: reg,
		LastTick: func() time.Time {
			if ns := lastTick.Load(); ns != 0 {
				return time.Unix(0, ns)
			}
			return time.Time{}
		},
		Period: 100 * time.Millisecond,
		Ready:  func() []string { return nil },
	})
	if err != nil {
		return
	}
	if err := h.Listen(); err != nil {
		return
	}
	g := NewGroup(context.Background())
	g.Go("http", h.Serve)
	// ... run the daemon; on shutdown:
	_ = g.Stop()
}
