package daemon

import (
	"embed"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"log/slog"
	"math"
	"math/cmplx"
	"net/http"
	"slices"
	"strconv"
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

// pageRow is the fixed part of one tick kept for the page; its numbers per
// output, state and input are in the ring's vals.
type pageRow struct {
	seq               uint64
	t                 time.Time
	status            Status
	gains             string
	nis, mean, lo, hi float64
	dof               int
	late, compute     float64 // seconds; NaN unknown
	missed            uint64
	noGain            bool
	inStale           uint64 // bit i: input i stale
	used, out, stale  estimator.Pattern

	cand                  bool
	cGains                string
	cStatus               Status
	cNIS, cMean, cLo, cHi float64
	cDof                  int
	cUsed, cOut           estimator.Pattern
}

// The per-row numbers, in vals: per output measured, predicted, innovation,
// innovation std, age; per state value, std; per input value, age; then the
// candidate's per output predicted, innovation, innovation std and per
// state value, std.
const (
	outVals   = 5
	stateVals = 2
	inVals    = 2
	cOutVals  = 3
)

func (pe *pageEst) stride() int {
	return pe.p*outVals + pe.n*stateVals + pe.m*inVals + pe.p*cOutVals + pe.n*stateVals
}

// pageRing is a fixed ring of rows, oldest first.
type pageRing struct {
	rows    []pageRow
	vals    []float64
	stride  int
	head, n int
	evicted uint64 // seq of the newest row overwritten; 0 none
}

func newPageRing(rows, stride int) pageRing {
	return pageRing{rows: make([]pageRow, rows), vals: make([]float64, rows*stride), stride: stride}
}

// phys returns the slot of logical row i (0 the oldest).
func (r *pageRing) phys(i int) int {
	c := len(r.rows)
	return (r.head - r.n + i + c) % c
}

// push makes room for a new row and returns it and its numbers.
func (r *pageRing) push() (*pageRow, []float64) {
	c := len(r.rows)
	if r.n == c {
		r.evicted = r.rows[r.head].seq
	} else {
		r.n++
	}
	i := r.head
	r.head = (r.head + 1) % c
	return &r.rows[i], r.vals[i*r.stride : (i+1)*r.stride]
}

// after returns the logical index of the first row with seq > since, and
// whether rows after since have been overwritten.
func (r *pageRing) after(since uint64) (int, bool) {
	lo, hi := 0, r.n
	for lo < hi {
		mid := (lo + hi) / 2
		if r.rows[r.phys(mid)].seq <= since {
			lo = mid + 1
		} else {
			hi = mid
		}
	}
	return lo, r.evicted > since
}

// last returns the seq of the newest row, 0 when empty.
func (r *pageRing) last() uint64 {
	if r.n == 0 {
		return 0
	}
	return r.rows[r.phys(r.n-1)].seq
}

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

// record writes the tick into the ring and reports whether a row was kept.
func (pe *pageEst) record(est, cand *Estimate, tt TickTiming) bool {
	var stale estimator.Pattern
	for j := range est.Outputs {
		if est.Outputs[j].Stale {
			stale |= 1 << uint(j)
		}
	}
	pe.mu.Lock()
	defer pe.mu.Unlock()
	pe.count++
	pe.pendOut |= est.Outliers
	pe.pendStale |= stale
	if pe.every > 1 && pe.count%pe.every != 1 {
		return false
	}
	r, v := pe.ring.push()
	*r = pageRow{
		seq: est.Seq, t: est.Time, status: est.Status, gains: est.Gains,
		nis: est.NIS, mean: est.NISMean, lo: est.NISBand[0], hi: est.NISBand[1], dof: est.Dof,
		late: tt.Lateness.Seconds(), compute: tt.Compute.Seconds(), missed: tt.Missed,
		noGain: est.NoGain, used: est.Used, out: pe.pendOut, stale: pe.pendStale,
	}
	pe.pendOut, pe.pendStale = 0, 0
	k := 0
	for j := 0; j < pe.p; j++ {
		o := outputAt(est, j)
		v[k], v[k+1], v[k+2], v[k+3], v[k+4] = o.Measured, o.Predicted, o.Innovation, o.InnovationStd, o.Age
		k += outVals
	}
	for i := 0; i < pe.n; i++ {
		s := stateAt(est, i)
		v[k], v[k+1] = s.Value, s.Std
		k += stateVals
	}
	for i := 0; i < pe.m; i++ {
		in := inputAt(est, i)
		v[k], v[k+1] = in.Value, in.Age
		if in.Stale {
			r.inStale |= 1 << uint(i)
		}
		k += inVals
	}
	if cand != nil {
		r.cand, r.cGains, r.cStatus = true, cand.Gains, cand.Status
		r.cNIS, r.cMean, r.cLo, r.cHi, r.cDof = cand.NIS, cand.NISMean, cand.NISBand[0], cand.NISBand[1], cand.Dof
		r.cUsed, r.cOut = cand.Used, cand.Outliers
	}
	for j := 0; j < pe.p; j++ {
		o := outputAt(cand, j)
		v[k], v[k+1], v[k+2] = o.Predicted, o.Innovation, o.InnovationStd
		k += cOutVals
	}
	for i := 0; i < pe.n; i++ {
		s := stateAt(cand, i)
		v[k], v[k+1] = s.Value, s.Std
		k += stateVals
	}
	return true
}

var nanOutput = OutputEstimate{Measured: math.NaN(), Predicted: math.NaN(), Innovation: math.NaN(), InnovationStd: math.NaN(), Age: math.NaN()}

// outputAt returns output j of est, or NaNs when est is nil or short.
func outputAt(est *Estimate, j int) OutputEstimate {
	if est == nil || j >= len(est.Outputs) {
		return nanOutput
	}
	return est.Outputs[j]
}

func stateAt(est *Estimate, i int) StateEstimate {
	if est == nil || i >= len(est.States) {
		return StateEstimate{Value: math.NaN(), Std: math.NaN()}
	}
	return est.States[i]
}

func inputAt(est *Estimate, i int) InputValue {
	if est == nil || i >= len(est.Inputs) {
		return InputValue{Value: math.NaN(), Age: math.NaN()}
	}
	return est.Inputs[i]
}

// wake signals every open stream of the estimator, never waiting: a stream
// already signalled stays signalled once.
func (pe *pageEst) wake() {
	cs := pe.clients.Load()
	if cs == nil {
		return
	}
	for _, c := range *cs {
		select {
		case c.wake <- struct{}{}:
		default:
		}
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

// lookup returns the estimator named by the request's "estimator" parameter,
// or writes a 404 and returns nil.
func (p *Page) lookup(w http.ResponseWriter, r *http.Request) *pageEst {
	name := r.URL.Query().Get("estimator")
	pe := p.byName[name]
	if pe == nil {
		writeText(w, http.StatusNotFound, fmt.Sprintf("no estimator %q\n", name))
	}
	return pe
}

func writeJSON(w http.ResponseWriter, body []byte) {
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.Write(body)
}

// The JSON of /api/estimators.
type (
	pageInfo struct {
		Name    string       `json:"name"`
		Period  float64      `json:"period"`  // seconds
		History float64      `json:"history"` // seconds the ring covers
		Every   uint64       `json:"every"`   // one tick kept in every
		Window  int          `json:"window"`  // NIS and RMS window, ticks
		Gate    float64      `json:"gate"`
		States  []pageSignal `json:"states"`
		Inputs  []pageSignal `json:"inputs"`
		Outputs []pageSignal `json:"outputs"`
		Gains   *pageGains   `json:"gains"`
	}
	pageSignal struct {
		Name   string      `json:"name"`
		Unit   string      `json:"unit"`
		MaxAge float64     `json:"max_age,omitempty"` // seconds
		Range  *[2]float64 `json:"range,omitempty"`
	}
	pageGains struct {
		Active      string    `json:"active"`
		Candidate   string    `json:"candidate"`
		Fingerprint string    `json:"fingerprint"`
		Sets        []pageSet `json:"sets"`
	}
	pageSet struct {
		Name     string   `json:"name"`
		Form     string   `json:"form"`
		Method   string   `json:"method"`
		Poles    []string `json:"poles"` // achieved error-dynamics eigenvalues, full pattern
		Patterns int      `json:"patterns"`
		Created  string   `json:"created,omitempty"`
		Tool     string   `json:"tool,omitempty"`
		Note     string   `json:"note,omitempty"`
	}
)

func (p *Page) serveEstimators(w http.ResponseWriter, _ *http.Request) {
	infos := make([]pageInfo, 0, len(p.ests))
	for _, pe := range p.ests {
		infos = append(infos, pe.info())
	}
	body, err := json.Marshal(infos)
	if err != nil {
		writeText(w, http.StatusInternalServerError, "live page: "+err.Error()+"\n")
		return
	}
	writeJSON(w, body)
}

func (pe *pageEst) info() pageInfo {
	md := pe.plant.Model
	in := pageInfo{
		Name: pe.name, Period: pe.period.Seconds(), Every: pe.every, Window: pe.window, Gate: pe.plant.Gate,
		History: float64(len(pe.ring.rows)) * float64(pe.every) * pe.period.Seconds(),
	}
	for i := 0; i < pe.n; i++ {
		s := pageSignal{Name: signalName(md.States, i, "x")}
		if i < len(md.States) {
			s.Unit = md.States[i].Unit
		}
		in.States = append(in.States, s)
	}
	wires := func(ws []config.Wire) []pageSignal {
		out := make([]pageSignal, 0, len(ws))
		for _, w := range ws {
			s := pageSignal{Name: w.Signal, Unit: w.Unit, MaxAge: w.MaxAge.Seconds()}
			if w.HasRange {
				s.Range = &[2]float64{w.Min, w.Max}
			}
			out = append(out, s)
		}
		return out
	}
	in.Inputs, in.Outputs = wires(pe.plant.Inputs), wires(pe.plant.Outputs)
	if pe.gains == nil {
		return in
	}
	gf := pe.gains()
	if gf == nil {
		return in
	}
	g := &pageGains{Active: gf.Active, Candidate: gf.Candidate, Fingerprint: gf.Fingerprint}
	for _, ns := range gf.Sets {
		if ns.Set == nil {
			continue
		}
		s := pageSet{
			Name: ns.Set.Name, Form: ns.Set.Form.String(), Method: ns.Provenance.Method,
			Patterns: len(ns.Set.Gains), Tool: ns.Provenance.Tool, Note: ns.Provenance.Note,
		}
		if !ns.Provenance.Created.IsZero() {
			s.Created = ns.Provenance.Created.UTC().Format(time.RFC3339)
		}
		if len(ns.Set.Gains) > 0 {
			for _, z := range ns.Set.Gains[0].Poles {
				s.Poles = append(s.Poles, formatPole(z))
			}
		}
		g.Sets = append(g.Sets, s)
	}
	in.Gains = g
	return in
}

// formatPole writes an eigenvalue with four significant digits: "0.997" for
// a real one, "0.95+0.031i (|z| 0.9505)" for a complex one, each of a
// conjugate pair written on its own.
func formatPole(z complex128) string {
	re := strconv.FormatFloat(real(z), 'g', 4, 64)
	if imag(z) == 0 {
		return re
	}
	sign := "+"
	if imag(z) < 0 {
		sign = "-"
	}
	return re + sign + strconv.FormatFloat(math.Abs(imag(z)), 'g', 4, 64) + "i" +
		" (|z| " + strconv.FormatFloat(cmplx.Abs(z), 'g', 4, 64) + ")"
}

// serveHistory writes every row the estimator's ring holds:
// {"gap": false, "rows": [row, …], "seq": newest}.
func (p *Page) serveHistory(w http.ResponseWriter, r *http.Request) {
	pe := p.lookup(w, r)
	if pe == nil {
		return
	}
	var st pageStream
	st.init(pe)
	body, _, _ := st.next(pe, 0)
	if body == nil {
		body = st.empty(pe)
	}
	writeJSON(w, body)
}

// serveAudit writes the estimator's audit trail, newest first: a JSON
// array of AuditEntry, empty without an AuditTail.
func (p *Page) serveAudit(w http.ResponseWriter, r *http.Request) {
	pe := p.lookup(w, r)
	if pe == nil {
		return
	}
	out := []AuditEntry{}
	if p.opts.AuditTail != nil {
		out = append(out, p.opts.AuditTail(pe.name, pageAuditLen)...)
		slices.Reverse(out)
	}
	body, err := json.Marshal(out)
	if err != nil {
		writeText(w, http.StatusInternalServerError, "live page: "+err.Error()+"\n")
		return
	}
	writeJSON(w, body)
}

// pageStream is one reader of an estimator's ring: its copy buffers and its
// output buffer.
type pageStream struct {
	rows []pageRow
	vals []float64
	buf  []byte
}

func (st *pageStream) init(pe *pageEst) {
	st.rows = make([]pageRow, pageChunk)
	st.vals = make([]float64, pageChunk*pe.ring.stride)
}

// next encodes the rows after since, at most the whole ring, as one JSON
// object, and returns it (nil when there are none), the seq of the newest
// row in it and whether rows after since were lost.
func (st *pageStream) next(pe *pageEst, since uint64) (body []byte, last uint64, gap bool) {
	st.buf = st.buf[:0]
	first := true
	for {
		pe.mu.Lock()
		i, lost := pe.ring.after(since)
		k := min(pe.ring.n-i, pageChunk)
		for j := 0; j < k; j++ {
			ph := pe.ring.phys(i + j)
			st.rows[j] = pe.ring.rows[ph]
			copy(st.vals[j*pe.ring.stride:(j+1)*pe.ring.stride], pe.ring.vals[ph*pe.ring.stride:(ph+1)*pe.ring.stride])
		}
		more := pe.ring.n-i > k
		pe.mu.Unlock()
		if first {
			gap = lost
			st.buf = append(st.buf, `{"gap":`...)
			st.buf = strconv.AppendBool(st.buf, gap)
			st.buf = append(st.buf, `,"rows":[`...)
		}
		for j := 0; j < k; j++ {
			if !first || j > 0 {
				st.buf = append(st.buf, ',')
			}
			st.buf = pe.appendRow(st.buf, &st.rows[j], st.vals[j*pe.ring.stride:(j+1)*pe.ring.stride])
		}
		if k > 0 {
			first = false
			since = st.rows[k-1].seq
			last = since
		}
		if !more || k == 0 {
			break
		}
	}
	if last == 0 && !gap {
		return nil, 0, false
	}
	st.buf = append(st.buf, `],"seq":`...)
	st.buf = strconv.AppendUint(st.buf, last, 10)
	st.buf = append(st.buf, '}')
	return st.buf, last, gap
}

// empty returns an update with no rows.
func (st *pageStream) empty(pe *pageEst) []byte {
	pe.mu.Lock()
	last := pe.ring.last()
	pe.mu.Unlock()
	b := append(st.buf[:0], `{"gap":false,"rows":[],"seq":`...)
	b = strconv.AppendUint(b, last, 10)
	return append(b, '}')
}

// appendRow writes one row:
//
//	{"seq", "t" (Unix seconds), "status", "gains", "nis", "dof", "nis_mean",
//	 "nis_band": [lo, hi], "late", "compute" (seconds), "missed", "no_gain",
//	 "out": [[measured, predicted, innovation, innovation_std, age, flags], …],
//	 "x": [[value, std], …], "u": [[value, age, stale], …],
//	 "cand": null or {"gains", "status", "nis", "dof", "nis_mean", "nis_band",
//	          "out": [[predicted, innovation, innovation_std, flags], …],
//	          "x": [[value, std], …]}}
//
// flags: 1 used, 2 rejected by the gate, 4 stale.
func (pe *pageEst) appendRow(b []byte, r *pageRow, v []float64) []byte {
	b = append(b, `{"seq":`...)
	b = strconv.AppendUint(b, r.seq, 10)
	b = append(b, `,"t":`...)
	b = strconv.AppendFloat(b, float64(r.t.UnixNano())/1e9, 'f', 3, 64)
	b = append(b, `,"status":`...)
	b = appendString(b, r.status.String())
	b = append(b, `,"gains":`...)
	b = appendString(b, r.gains)
	b = appendNIS(b, r.nis, r.dof, r.mean, r.lo, r.hi)
	b = append(b, `,"late":`...)
	b = appendFloat(b, r.late)
	b = append(b, `,"compute":`...)
	b = appendFloat(b, r.compute)
	b = append(b, `,"missed":`...)
	b = strconv.AppendUint(b, r.missed, 10)
	b = append(b, `,"no_gain":`...)
	b = strconv.AppendBool(b, r.noGain)
	b = append(b, `,"out":[`...)
	k := 0
	for j := 0; j < pe.p; j++ {
		if j > 0 {
			b = append(b, ',')
		}
		b = append(b, '[')
		for q := 0; q < outVals; q++ {
			b = appendFloat(b, v[k+q])
			b = append(b, ',')
		}
		b = strconv.AppendInt(b, int64(flags(r.used, r.out, r.stale, j)), 10)
		b = append(b, ']')
		k += outVals
	}
	b = append(b, `],"x":`...)
	b, k = appendPairs(b, v, k, pe.n)
	b = append(b, `,"u":[`...)
	for i := 0; i < pe.m; i++ {
		if i > 0 {
			b = append(b, ',')
		}
		b = append(b, '[')
		b = appendFloat(b, v[k])
		b = append(b, ',')
		b = appendFloat(b, v[k+1])
		b = append(b, ',')
		b = strconv.AppendBool(b, r.inStale&(1<<uint(i)) != 0)
		b = append(b, ']')
		k += inVals
	}
	b = append(b, `],"cand":`...)
	if !r.cand {
		return append(b, "null}"...)
	}
	b = append(b, `{"gains":`...)
	b = appendString(b, r.cGains)
	b = append(b, `,"status":`...)
	b = appendString(b, r.cStatus.String())
	b = appendNIS(b, r.cNIS, r.cDof, r.cMean, r.cLo, r.cHi)
	b = append(b, `,"out":[`...)
	for j := 0; j < pe.p; j++ {
		if j > 0 {
			b = append(b, ',')
		}
		b = append(b, '[')
		for q := 0; q < cOutVals; q++ {
			b = appendFloat(b, v[k+q])
			b = append(b, ',')
		}
		b = strconv.AppendInt(b, int64(flags(r.cUsed, r.cOut, r.stale, j)), 10)
		b = append(b, ']')
		k += cOutVals
	}
	b = append(b, `],"x":`...)
	b, _ = appendPairs(b, v, k, pe.n)
	return append(b, "}}"...)
}

func appendNIS(b []byte, nis float64, dof int, mean, lo, hi float64) []byte {
	b = append(b, `,"nis":`...)
	b = appendFloat(b, nis)
	b = append(b, `,"dof":`...)
	b = strconv.AppendInt(b, int64(dof), 10)
	b = append(b, `,"nis_mean":`...)
	b = appendFloat(b, mean)
	b = append(b, `,"nis_band":[`...)
	b = appendFloat(b, lo)
	b = append(b, ',')
	b = appendFloat(b, hi)
	return append(b, ']')
}

// appendPairs writes count pairs of v from k as [[a, b], …] and returns the
// index after them.
func appendPairs(b []byte, v []float64, k, count int) ([]byte, int) {
	b = append(b, '[')
	for i := 0; i < count; i++ {
		if i > 0 {
			b = append(b, ',')
		}
		b = append(b, '[')
		b = appendFloat(b, v[k])
		b = append(b, ',')
		b = appendFloat(b, v[k+1])
		b = append(b, ']')
		k += 2
	}
	return append(b, ']'), k
}

func flags(used, out, stale estimator.Pattern, j int) int {
	f := 0
	if used.Has(j) {
		f |= 1
	}
	if out.Has(j) {
		f |= 2
	}
	if stale.Has(j) {
		f |= 4
	}
	return f
}

// serveEvents streams the estimator's rows as Server-Sent Events: each
// update is one "tick" event whose data is the JSON of /api/history with
// the rows since the previous update, plus "samples" (counts received and
// rejected by signal and reason) when a Gatherer is set, at most once a
// second. The stream starts after the Last-Event-ID a reconnecting browser
// sends, or else after ?since=SEQ, or else with the next tick. A client that
// asks for ticks after the newest one has seen a previous run of the
// daemon: its first update starts at the oldest row and says "reset": true.
func (p *Page) serveEvents(w http.ResponseWriter, r *http.Request) {
	pe := p.lookup(w, r)
	if pe == nil {
		return
	}
	var since uint64
	// A reconnecting browser repeats the URL and says what it has seen.
	arg := r.Header.Get("Last-Event-ID")
	if arg == "" {
		arg = r.URL.Query().Get("since")
	}
	if arg != "" {
		v, err := strconv.ParseUint(arg, 10, 64)
		if err != nil {
			writeText(w, http.StatusBadRequest, fmt.Sprintf("since %q: want a tick sequence number\n", arg))
			return
		}
		since = v
	}
	pe.mu.Lock()
	newest := pe.ring.last()
	pe.mu.Unlock()
	// A client that has seen ticks this page never had saw an earlier run
	// of the daemon: it starts again from the oldest row, told to reset.
	reset := since > newest
	if arg == "" || reset {
		since = newest
	}
	if reset {
		since = 0
	}

	rc := http.NewResponseController(w)
	h := w.Header()
	h.Set("Content-Type", "text/event-stream")
	h.Set("Cache-Control", "no-store")
	h.Set("X-Accel-Buffering", "no")
	w.WriteHeader(http.StatusOK)

	c := &pageClient{wake: make(chan struct{}, 1)}
	pe.addClient(c)
	p.streams.Add(1)
	defer func() {
		pe.removeClient(c)
		p.streams.Add(-1)
	}()
	c.wake <- struct{}{} // send what is already there after since

	ctx := r.Context()
	write := func(b []byte) bool {
		if err := rc.SetWriteDeadline(time.Now().Add(p.opts.WriteTimeout)); err != nil && !errors.Is(err, http.ErrNotSupported) {
			return false
		}
		if _, err := w.Write(b); err != nil {
			p.dropped.Add(1)
			p.opts.Log.Info("live page: client dropped", "estimator", pe.name, "remote", r.RemoteAddr, "error", err)
			return false
		}
		if err := rc.Flush(); err != nil {
			p.dropped.Add(1)
			p.opts.Log.Info("live page: client dropped", "estimator", pe.name, "remote", r.RemoteAddr, "error", err)
			return false
		}
		return true
	}
	if !write([]byte("retry: 2000\n\n")) {
		return
	}

	var st pageStream
	st.init(pe)
	gapEvery := time.Second / time.Duration(p.opts.Rate)
	keep := time.NewTicker(pageKeepAlive)
	defer keep.Stop()
	pause := time.NewTimer(0)
	<-pause.C
	var lastSent, lastSamples time.Time
	var out []byte
	for {
		select {
		case <-ctx.Done():
			return
		case <-keep.C:
			if !write([]byte(": keep-alive\n\n")) {
				return
			}
			continue
		case <-c.wake:
		}
		if wait := gapEvery - time.Since(lastSent); !lastSent.IsZero() && wait > 0 {
			pause.Reset(wait)
			select {
			case <-ctx.Done():
				return
			case <-pause.C:
			}
			select { // what arrived meanwhile goes with this update
			case <-c.wake:
			default:
			}
		}
		body, last, gap := st.next(pe, since)
		if body == nil {
			continue
		}
		if gap {
			p.gaps.Add(1)
		}
		now := time.Now()
		if p.opts.Gatherer != nil && now.Sub(lastSamples) >= time.Second {
			if s := p.samples(pe.name, now); s != nil {
				body = append(body[:len(body)-1], `,"samples":`...)
				body = append(body, s...)
				body = append(body, '}')
			}
			lastSamples = now
		}
		out = append(out[:0], "id: "...)
		out = strconv.AppendUint(out, last, 10)
		out = append(out, "\nevent: tick\ndata: "...)
		if reset {
			out = append(out, `{"reset":true,`...)
			body = body[1:]
		}
		out = append(out, body...)
		out = append(out, "\n\n"...)
		if !write(out) {
			return
		}
		p.messages.Add(1)
		since, lastSent, reset = last, now, false
	}
}

func (pe *pageEst) addClient(c *pageClient) {
	pe.clientMu.Lock()
	defer pe.clientMu.Unlock()
	var next []*pageClient
	if cur := pe.clients.Load(); cur != nil {
		next = append(next, *cur...)
	}
	next = append(next, c)
	pe.clients.Store(&next)
}

func (pe *pageEst) removeClient(c *pageClient) {
	pe.clientMu.Lock()
	defer pe.clientMu.Unlock()
	cur := pe.clients.Load()
	if cur == nil {
		return
	}
	var rest []*pageClient
	for _, x := range *cur {
		if x != c {
			rest = append(rest, x)
		}
	}
	if len(rest) == 0 {
		pe.clients.Store(nil)
	} else {
		pe.clients.Store(&rest)
	}
}

// samples returns the JSON object of the estimator's sample counts,
// {"signal": {"received": n, "<reason>": n, …}, …}, read from the gatherer
// at most once a second for all estimators; nil when unknown.
func (p *Page) samples(name string, now time.Time) []byte {
	p.rejMu.Lock()
	defer p.rejMu.Unlock()
	if p.rej == nil || now.Sub(p.rejAt) >= time.Second {
		p.rejAt = now
		m, err := p.gatherSamples()
		if err != nil {
			p.opts.Log.Warn("live page: reading the sample counts", "error", err)
		}
		p.rej = m
	}
	return p.rej[name]
}

// gatherSamples reads surmise_samples_received_total and
// surmise_samples_rejected_total for every estimator.
func (p *Page) gatherSamples() (map[string][]byte, error) {
	fams, err := p.opts.Gatherer.Gather()
	counts := map[string]map[string]map[string]float64{} // estimator → signal → kind → n
	for _, f := range fams {
		kind := ""
		switch f.GetName() {
		case "surmise_samples_received_total":
			kind = "received"
		case "surmise_samples_rejected_total":
		default:
			continue
		}
		for _, m := range f.GetMetric() {
			var est, sig, k string
			for _, l := range m.GetLabel() {
				switch l.GetName() {
				case labelEstimator:
					est = l.GetValue()
				case labelSignal:
					sig = l.GetValue()
				case labelReason:
					k = l.GetValue()
				}
			}
			if kind != "" {
				k = kind
			}
			if est == "" || sig == "" || k == "" || m.GetCounter() == nil {
				continue
			}
			if counts[est] == nil {
				counts[est] = map[string]map[string]float64{}
			}
			if counts[est][sig] == nil {
				counts[est][sig] = map[string]float64{}
			}
			counts[est][sig][k] += m.GetCounter().GetValue()
		}
	}
	out := make(map[string][]byte, len(counts))
	for est, c := range counts {
		b, jerr := json.Marshal(c)
		if jerr != nil {
			return out, errors.Join(err, jerr)
		}
		out[est] = b
	}
	return out, err
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
