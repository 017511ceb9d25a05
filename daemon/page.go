package daemon

import (
	"embed"
	"fmt"
	"io/fs"
	"log/slog"
	"net/http"
	"sync"
	"sync/atomic"
	"time"
	"unsafe"

	"github.com/prometheus/client_golang/prometheus"

	"surmise/config"
	"surmise/estimator"
)

// pageAssets are the live page's files: index.html, its script and style
// sheet, and the vendored chart library (page/vendor/uplot, MIT). The page
// needs nothing from the network.
//
//go:embed page
var pageAssets embed.FS

// Defaults of PageOptions.
const (
	DefaultPageHistory      = 5 * time.Minute
	DefaultPageRate         = 10 // updates per second per client
	DefaultPageWriteTimeout = 10 * time.Second

	// pageMaxRows bounds an estimator's history ring: a faster estimator
	// keeps one tick in every ⌈history/period/pageMaxRows⌉.
	pageMaxRows = 3000
	// pageBudget bounds the memory of all history rings together, so that a
	// process with a fleet of estimators keeps a thinner history of each
	// instead of gigabytes (one 10-state estimator's full ring is about
	// 2 MB). Every ring keeps at least pageMinRows rows.
	pageBudget  = 256 << 20
	pageMinRows = 120
	// pageAuditLen is the number of audit entries the page shows.
	pageAuditLen = 50
	// pageChunk is the number of rows a stream copies out of a ring at a
	// time: the tick waits for at most one chunk's copy.
	pageChunk = 256
	// pageKeepAlive is how often an idle stream sends a comment line, so
	// that proxies keep it open and a dead client is noticed.
	pageKeepAlive = 15 * time.Second
)

// PageOptions configures a [Page]. The zero value means the defaults.
type PageOptions struct {
	// History is how much of the past each estimator keeps for the page;
	// default DefaultPageHistory. The ring holds at most 3000 rows, fewer
	// when many estimators share the page's memory budget (256 MiB for all
	// rings; at least 120 rows each); a faster estimator keeps one tick in k
	// (the page says which), ORing the outlier and stale flags of the ticks
	// it skips into the next one kept.
	History time.Duration

	// Rate is the largest number of updates per second sent to one client
	// of /events; default DefaultPageRate. Each update carries every row
	// since the previous one, so a slower rate loses nothing.
	Rate int

	// WriteTimeout is how long one update may take to write to a client
	// before the client is dropped; default DefaultPageWriteTimeout.
	WriteTimeout time.Duration

	// Gatherer, when not nil, is read at most once a second for the counts
	// of samples received and rejected by reason
	// (surmise_samples_received_total, surmise_samples_rejected_total).
	Gatherer prometheus.Gatherer

	// AuditTail, when not nil, returns the latest n entries of the audit
	// trail of an estimator, oldest first (Audit.Tail); the page shows
	// them newest first.
	AuditTail func(estimator string, n int) []AuditEntry

	// Log receives the page's errors; nil means none are logged.
	Log *slog.Logger
}

// PageEstimator is one estimator shown on a Page.
type PageEstimator struct {
	// Plant is the estimator's validated plant file: its name, sample time,
	// signal names and units, and NIS window.
	Plant *config.Plant
	// Gains returns the gains file in use, read for each /api/estimators
	// request; nil means the page shows no gain sets.
	Gains func() *config.GainsFile
}

// TickTiming is what the page shows of a tick besides its estimate.
type TickTiming struct {
	Lateness time.Duration // start of the tick − its due time
	Compute  time.Duration // start of the tick to its estimate's publication
	Missed   uint64        // ticks skipped before this one
}

// PageStats are counts kept by a Page, for tests and diagnostics.
type PageStats struct {
	Clients  int    // /events streams open now
	Messages uint64 // updates written to clients
	Dropped  uint64 // streams closed because a write did not finish in time
	Gaps     uint64 // updates that had to skip rows a slow client had not read
}

// Page is the live residual page at "/": for each estimator, its
// innovations with their ±2√S band, NIS against its chi-square band, states
// with ±2σ beside the measured outputs, its status over time, tick timing,
// sample ages, rejected samples, the active and candidate gain sets and the
// audit trail of swaps; updated live by Server-Sent Events.
//
// A Page keeps a fixed ring of rows per estimator. The tick path, Observe,
// writes one row and signals the open streams without waiting for any of
// them and without allocating; each stream's handler goroutine copies the
// new rows out and writes them at most Rate times a second. A client too slow
// to take one update within WriteTimeout is dropped; one that falls more
// than the ring behind is told of the gap.
//
// Routes (see Register): "GET /{$}" the page; "GET /page/" its files;
// "GET /api/estimators" names, units and gain sets; "GET /api/history"
// (?estimator=NAME) the ring's rows; "GET /api/audit" (?estimator=NAME) the
// audit trail; "GET /events" (?estimator=NAME[&since=SEQ]) the stream.
type Page struct {
	opts   PageOptions
	ests   []*pageEst
	byName map[string]*pageEst
	files  http.Handler
	index  []byte

	streams  atomic.Int64
	messages atomic.Uint64
	dropped  atomic.Uint64
	gaps     atomic.Uint64

	rejMu sync.Mutex
	rejAt time.Time
	rej   map[string][]byte // estimator → JSON object of counts
}

// pageEst is one estimator's part of a Page.
type pageEst struct {
	name   string
	plant  *config.Plant
	gains  func() *config.GainsFile
	period time.Duration
	window int
	n, m   int // states, inputs
	p      int // outputs
	every  uint64

	mu        sync.Mutex // guards the fields below
	ring      pageRing
	count     uint64            // ticks observed
	pendOut   estimator.Pattern // outliers of skipped ticks
	pendStale estimator.Pattern // stale outputs of skipped ticks

	clientMu sync.Mutex
	clients  atomic.Pointer[[]*pageClient]
}

// pageClient is one open /events stream.
type pageClient struct{ wake chan struct{} }

// NewPage returns a page for the estimators, in the order the page lists
// them. It fails when an estimator has no plant or two share a name.
func NewPage(ests []PageEstimator, opts PageOptions) (*Page, error) {
	if opts.History <= 0 {
		opts.History = DefaultPageHistory
	}
	if opts.Rate <= 0 {
		opts.Rate = DefaultPageRate
	}
	if opts.WriteTimeout <= 0 {
		opts.WriteTimeout = DefaultPageWriteTimeout
	}
	if opts.Log == nil {
		opts.Log = slog.New(slog.DiscardHandler)
	}
	sub, err := fs.Sub(pageAssets, "page")
	if err != nil {
		return nil, fmt.Errorf("live page: %w", err)
	}
	index, err := fs.ReadFile(sub, "index.html")
	if err != nil {
		return nil, fmt.Errorf("live page: %w", err)
	}
	p := &Page{
		opts:   opts,
		byName: make(map[string]*pageEst, len(ests)),
		files:  http.StripPrefix("/page/", http.FileServerFS(sub)),
		index:  index,
	}
	for i, e := range ests {
		if e.Plant == nil || e.Plant.Model == nil {
			return nil, fmt.Errorf("live page: estimator %d has no plant", i)
		}
		name := e.Plant.Name
		if _, dup := p.byName[name]; dup {
			return nil, fmt.Errorf("live page: two estimators named %q", name)
		}
		period := periodOf(e.Plant)
		if period <= 0 {
			return nil, fmt.Errorf("live page: estimator %s: sample time %v s is not a positive duration", name, e.Plant.Model.Ts)
		}
		n, m, pp := e.Plant.Model.Dims()
		win := e.Plant.Window
		if win <= 0 {
			win = config.DefaultWindow
		}
		pe := &pageEst{
			name: name, plant: e.Plant, gains: e.Gains, period: period, window: win,
			n: n, m: m, p: pp,
		}
		rowBytes := int64(pe.stride())*8 + int64(unsafe.Sizeof(pageRow{}))
		maxRows := min(int64(pageMaxRows), max(pageBudget/(int64(len(ests))*rowBytes), pageMinRows))
		ticks := max(int64(opts.History/period), 1)
		every := (ticks + maxRows - 1) / maxRows
		pe.every = uint64(every)
		pe.ring = newPageRing(int(min(ticks, maxRows)), pe.stride())
		p.ests = append(p.ests, pe)
		p.byName[name] = pe
	}
	return p, nil
}

// Observe records one tick of estimator name: est is the active gain set's
// estimate, cand the candidate lane's or nil. It is called on the tick path:
// it allocates nothing, never waits for a client, and ignores an unknown
// name. Ticks of one estimator must not overlap (those of different
// estimators may).
func (p *Page) Observe(name string, est, cand *Estimate, tt TickTiming) {
	pe := p.byName[name]
	if pe == nil || est == nil {
		return
	}
	if pe.record(est, cand, tt) {
		pe.wake()
	}
}

// Stats returns the page's counts.
func (p *Page) Stats() PageStats {
	return PageStats{
		Clients:  int(p.streams.Load()),
		Messages: p.messages.Load(),
		Dropped:  p.dropped.Load(),
		Gaps:     p.gaps.Load(),
	}
}

// Register adds the page's routes to mux (an *http.ServeMux, an
// [HTTPServer] or a [Daemon]).
func (p *Page) Register(mux interface {
	Handle(pattern string, handler http.Handler)
}) {
	mux.Handle("GET /{$}", http.HandlerFunc(p.serveIndex))
	mux.Handle("GET /page/", http.HandlerFunc(p.serveFile))
	mux.Handle("GET /api/estimators", http.HandlerFunc(p.serveEstimators))
	mux.Handle("GET /api/history", http.HandlerFunc(p.serveHistory))
	mux.Handle("GET /api/audit", http.HandlerFunc(p.serveAudit))
	mux.Handle("GET /events", http.HandlerFunc(p.serveEvents))
}

// pageCSP allows the page's own files only: no inline script, nothing from
// elsewhere.
const pageCSP = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"

func (p *Page) serveIndex(w http.ResponseWriter, _ *http.Request) {
	h := w.Header()
	h.Set("Content-Type", "text/html; charset=utf-8")
	h.Set("Cache-Control", "no-store")
	h.Set("Content-Security-Policy", pageCSP)
	h.Set("X-Content-Type-Options", "nosniff")
	w.Write(p.index)
}

func (p *Page) serveFile(w http.ResponseWriter, r *http.Request) {
	h := w.Header()
	h.Set("Cache-Control", "no-cache")
	h.Set("Content-Security-Policy", pageCSP)
	h.Set("X-Content-Type-Options", "nosniff")
	p.files.ServeHTTP(w, r)
}

// newDaemonPage builds the live page of a daemon's estimators, adds its
// routes to the daemon's HTTP server and feeds it every tick from an
// estimate listener: the active estimate, the candidate lane's (read from
// the engine on the tick's goroutine into a buffer of the page's) and the
// tick's timing.
func newDaemonPage(d *Daemon) (*Page, error) {
	ests := make([]PageEstimator, len(d.estimators))
	cands := make(map[*Estimator]*Estimate, len(d.estimators))
	for i, e := range d.estimators {
		ests[i] = PageEstimator{Plant: e.plant, Gains: e.Gains}
		cands[e] = e.engine.NewEstimate()
	}
	opts := PageOptions{Gatherer: d.reg, Log: d.log}
	if d.comm != nil && d.comm.audit != nil {
		opts.AuditTail = d.comm.audit.Tail
	}
	p, err := NewPage(ests, opts)
	if err != nil {
		return nil, err
	}
	p.Register(d)
	d.OnEstimate(func(e *Estimator, est *Estimate, _ []byte) {
		var cand *Estimate
		if buf := cands[e]; buf != nil && e.engine.CandidateTo(buf) {
			cand = buf
		}
		p.Observe(e.name, est, cand, e.Timing())
	})
	return p, nil
}

// Page returns the daemon's live page, served at "/".
func (d *Daemon) Page() *Page { return d.page }
