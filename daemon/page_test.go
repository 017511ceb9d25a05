package daemon_test

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"net"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"surmise/config"
	"surmise/daemon"
	"surmise/estimator"
)

// pageRow is the part of a row of /api/history and /events the tests read.
type pageRow struct {
	Seq     uint64       `json:"seq"`
	T       float64      `json:"t"`
	Status  string       `json:"status"`
	Gains   string       `json:"gains"`
	NIS     *float64     `json:"nis"`
	Dof     int          `json:"dof"`
	NISMean *float64     `json:"nis_mean"`
	NISBand [2]*float64  `json:"nis_band"`
	Late    *float64     `json:"late"`
	Compute *float64     `json:"compute"`
	Missed  uint64       `json:"missed"`
	Out     [][]*float64 `json:"out"`
	X       [][]*float64 `json:"x"`
	U       []any        `json:"u"`
	Cand    *struct {
		Gains   string       `json:"gains"`
		Status  string       `json:"status"`
		NISMean *float64     `json:"nis_mean"`
		Out     [][]*float64 `json:"out"`
		X       [][]*float64 `json:"x"`
	} `json:"cand"`
}

// pageUpdate is the body of /api/history and of one /events update.
type pageUpdate struct {
	Reset   bool                          `json:"reset"`
	Gap     bool                          `json:"gap"`
	Rows    []pageRow                     `json:"rows"`
	Seq     uint64                        `json:"seq"`
	Samples map[string]map[string]float64 `json:"samples"`
}

// pageRig is a page over one engine of the demo hot-water loop, fed by a
// seeded simulation on virtual time (tick k at pageT0 + k·Ts).
type pageRig struct {
	t      testing.TB
	plant  *config.Plant
	gains  *config.GainsFile
	engine *daemon.Engine
	page   *daemon.Page
	srv    *httptest.Server
	sim    *estimator.Plant
	est    *daemon.Estimate
	cand   *daemon.Estimate
	u, y   []float64
	k      int
	ts     time.Duration
	reg    *prometheus.Registry
	mutate func(*daemon.Estimate) // applied to the estimate before Observe
}

var pageT0 = time.Date(2026, 12, 2, 6, 0, 0, 0, time.UTC)

func pageDemo(t testing.TB) (*config.Plant, *config.GainsFile) {
	t.Helper()
	plant, err := config.LoadPlant(filepath.Join("..", "testdata", "plants", "hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		t.Fatal(err)
	}
	return plant, gains
}

func newPageRig(t testing.TB, opts daemon.PageOptions, candidate bool) *pageRig {
	t.Helper()
	plant, gains := pageDemo(t)
	prep := func(name string) *estimator.Prepared {
		ns := gains.Set(name)
		if ns == nil {
			t.Fatalf("no gain set %q", name)
		}
		p, err := estimator.Prepare(plant.Model, ns.Set, plant.Gate)
		if err != nil {
			t.Fatal(err)
		}
		return p
	}
	reg := prometheus.NewPedanticRegistry()
	met := daemon.BindMetrics(daemon.NewMetrics(reg), plant, gains.Active)
	eo := daemon.EngineOptions{Metrics: met}
	if candidate {
		eo.Candidate = prep(gains.Candidate)
	}
	eng := daemon.NewEngine(plant, prep(gains.Active), eo)
	if opts.Gatherer == nil {
		opts.Gatherer = reg
	}
	page, err := daemon.NewPage([]daemon.PageEstimator{{Plant: plant, Gains: func() *config.GainsFile { return gains }}}, opts)
	if err != nil {
		t.Fatal(err)
	}
	mux := http.NewServeMux()
	page.Register(mux)
	srv := httptest.NewServer(mux)
	t.Cleanup(srv.Close)
	_, m, p := plant.Model.Dims()
	return &pageRig{
		t: t, plant: plant, gains: gains, engine: eng, page: page, srv: srv,
		sim: estimator.NewPlant(plant.Model, 7, nil), est: eng.NewEstimate(), cand: eng.NewEstimate(),
		u: append(make([]float64, 0, m), plant.Model.U0...), y: make([]float64, p),
		ts: time.Duration(plant.Model.Ts * float64(time.Second)), reg: reg,
	}
}

// tick steps the simulation, offers its input and (with outputs) its
// measurements, runs the engine's tick and hands the estimate to the page.
func (r *pageRig) tick(outputs bool) {
	r.k++
	at := pageT0.Add(time.Duration(r.k) * r.ts)
	r.sim.Step(r.u)
	r.sim.OutputTo(r.y)
	r.engine.Offer(0, r.u[0], at.Add(-time.Millisecond), at.Add(-time.Millisecond))
	if outputs {
		for j, v := range r.y {
			r.engine.Offer(1+j, v, at.Add(-time.Millisecond), at.Add(-time.Millisecond))
		}
	}
	r.engine.Tick(at, r.est)
	if r.mutate != nil {
		r.mutate(r.est)
	}
	var cand *daemon.Estimate
	if r.engine.CandidateTo(r.cand) {
		cand = r.cand
	}
	r.page.Observe(r.plant.Name, r.est, cand, daemon.TickTiming{Lateness: 3 * time.Millisecond, Compute: 40 * time.Microsecond, Missed: 0})
}

func (r *pageRig) get(path string) (*http.Response, []byte) {
	r.t.Helper()
	res, err := http.Get(r.srv.URL + path)
	if err != nil {
		r.t.Fatal(err)
	}
	defer res.Body.Close()
	body, err := io.ReadAll(res.Body)
	if err != nil {
		r.t.Fatal(err)
	}
	return res, body
}

func (r *pageRig) history() pageUpdate {
	r.t.Helper()
	res, body := r.get("/api/history?estimator=" + r.plant.Name)
	if res.StatusCode != http.StatusOK {
		r.t.Fatalf("history: %s: %s", res.Status, body)
	}
	var u pageUpdate
	if err := json.Unmarshal(body, &u); err != nil {
		r.t.Fatalf("history: %v in %s", err, body)
	}
	return u
}

func f64(p *float64) float64 {
	if p == nil {
		return math.NaN()
	}
	return *p
}

// same reports whether a number of the page's JSON is the estimate's: equal,
// or both unknown (NaN in Go, null in JSON).
func same(p *float64, want float64) bool {
	if p == nil {
		return math.IsNaN(want)
	}
	return *p == want
}

// TestPageHistoryMatchesEstimates checks that the history of the page holds
// each tick's estimate as the engine wrote it — the page shows the engine's
// numbers, not a recomputation — for the active and the candidate lane, and
// that /api/estimators describes the plant file and its gains file.
func TestPageHistoryMatchesEstimates(t *testing.T) {
	r := newPageRig(t, daemon.PageOptions{}, true)
	var last, lastCand daemon.Estimate
	for range 40 {
		r.tick(true)
	}
	// Deep copies of the last estimates: the engine reuses its slices.
	last = *r.est
	last.Outputs = append([]daemon.OutputEstimate(nil), r.est.Outputs...)
	last.States = append([]daemon.StateEstimate(nil), r.est.States...)
	lastCand = *r.cand
	lastCand.Outputs = append([]daemon.OutputEstimate(nil), r.cand.Outputs...)

	h := r.history()
	if len(h.Rows) != 40 || h.Seq != 40 || h.Gap {
		t.Fatalf("history: %d rows, seq %d, gap %v; want 40 rows, seq 40, no gap", len(h.Rows), h.Seq, h.Gap)
	}
	for i, row := range h.Rows {
		if row.Seq != uint64(i+1) {
			t.Fatalf("row %d has seq %d", i, row.Seq)
		}
	}
	row := h.Rows[39]
	if row.Status != last.Status.String() || row.Gains != last.Gains || row.Dof != last.Dof ||
		!same(row.NIS, last.NIS) || !same(row.NISMean, last.NISMean) ||
		!same(row.NISBand[0], last.NISBand[0]) || !same(row.NISBand[1], last.NISBand[1]) {
		t.Errorf("last row %+v, want the estimate's status %s, gains %s, NIS %v (%d), mean %v, band %v",
			row, last.Status, last.Gains, last.NIS, last.Dof, last.NISMean, last.NISBand)
	}
	if want := float64(last.Time.UnixMilli()) / 1000; math.Abs(row.T-want) > 5e-4 {
		t.Errorf("row time %v, want %v", row.T, want)
	}
	if f64(row.Late) != 0.003 || f64(row.Compute) != 40e-6 {
		t.Errorf("timing %v, %v; want the 3 ms and 40 µs given to Observe", f64(row.Late), f64(row.Compute))
	}
	for j, o := range last.Outputs {
		got := row.Out[j]
		want := []float64{o.Measured, o.Predicted, o.Innovation, o.InnovationStd, o.Age}
		for q, w := range want {
			if !same(got[q], w) {
				t.Errorf("output %s value %d: %v, want %v", o.Name, q, f64(got[q]), w)
			}
		}
		if f := int(f64(got[5])); f&1 == 0 || o.Used != (f&1 == 1) {
			t.Errorf("output %s flags %d, want used", o.Name, f)
		}
	}
	for i, s := range last.States {
		if !same(row.X[i][0], s.Value) || !same(row.X[i][1], s.Std) {
			t.Errorf("state %s: %v ± %v, want %v ± %v", s.Name, f64(row.X[i][0]), f64(row.X[i][1]), s.Value, s.Std)
		}
	}
	if row.Cand == nil {
		t.Fatal("no candidate in the row of an engine with a shadow lane")
	}
	if row.Cand.Gains != lastCand.Gains || !same(row.Cand.NISMean, lastCand.NISMean) {
		t.Errorf("candidate %s mean %v, want %s mean %v", row.Cand.Gains, f64(row.Cand.NISMean), lastCand.Gains, lastCand.NISMean)
	}
	for j, o := range lastCand.Outputs {
		if !same(row.Cand.Out[j][0], o.Predicted) || !same(row.Cand.Out[j][1], o.Innovation) {
			t.Errorf("candidate output %s: %v, %v; want %v, %v", o.Name, f64(row.Cand.Out[j][0]), f64(row.Cand.Out[j][1]), o.Predicted, o.Innovation)
		}
	}

	res, body := r.get("/api/estimators")
	if res.StatusCode != http.StatusOK {
		t.Fatalf("estimators: %s", res.Status)
	}
	var infos []struct {
		Name    string  `json:"name"`
		Period  float64 `json:"period"`
		History float64 `json:"history"`
		Every   int     `json:"every"`
		Window  int     `json:"window"`
		States  []struct{ Name, Unit string }
		Outputs []struct {
			Name, Unit string
			MaxAge     float64 `json:"max_age"`
		}
		Gains struct {
			Active, Candidate string
			Sets              []struct {
				Name, Form, Method string
				Poles              []string
			}
		}
	}
	if err := json.Unmarshal(body, &infos); err != nil {
		t.Fatal(err)
	}
	if len(infos) != 1 {
		t.Fatalf("%d estimators, want 1", len(infos))
	}
	in := infos[0]
	// The plant file: hotwater-loop, 1 s, window 100, 4 states, outputs
	// tank_outlet and hx_outlet in degC with max_age 3 s; the page keeps the
	// default 5 minutes, 300 ticks.
	if in.Name != "hotwater-loop" || in.Period != 1 || in.Window != 100 || in.History != 300 || in.Every != 1 ||
		len(in.States) != 4 || in.States[3].Name != "heat_loss" || in.States[3].Unit != "kW" ||
		len(in.Outputs) != 2 || in.Outputs[1].Name != "hx_outlet" || in.Outputs[1].Unit != "degC" || in.Outputs[1].MaxAge != 3 {
		t.Errorf("estimator description %+v does not match the plant file", in)
	}
	// The gains file: active poles-prediction (placed at 0.997, 0.97, 0.86,
	// 0.85), candidate kalman-current.
	if in.Gains.Active != "poles-prediction" || in.Gains.Candidate != "kalman-current" || len(in.Gains.Sets) != len(r.gains.Sets) {
		t.Fatalf("gains %+v do not match the gains file", in.Gains)
	}
	s0 := in.Gains.Sets[0]
	if s0.Name != "poles-prediction" || s0.Form != "prediction" || s0.Method != "poles" ||
		strings.Join(s0.Poles, " ") != "0.997 0.97 0.86 0.85" {
		t.Errorf("set %+v, want poles-prediction with poles 0.997 0.97 0.86 0.85", s0)
	}
}

// TestPageRingHistory checks the ring: it keeps the latest History worth of
// ticks, and a fast estimator keeps one tick in k with the outlier and stale
// flags of the ticks in between carried into the row kept.
func TestPageRingHistory(t *testing.T) {
	t.Run("wraps", func(t *testing.T) {
		r := newPageRig(t, daemon.PageOptions{History: 10 * time.Second}, false)
		for range 25 {
			r.tick(true)
		}
		h := r.history()
		if len(h.Rows) != 10 || h.Rows[0].Seq != 16 || h.Rows[9].Seq != 25 {
			t.Fatalf("%d rows from %d to %d, want the 10 ticks 16…25", len(h.Rows), h.Rows[0].Seq, h.Rows[len(h.Rows)-1].Seq)
		}
	})
	t.Run("decimates", func(t *testing.T) {
		// 1 s ticks for 2 h are 7200 ticks: one in ⌈7200/3000⌉ = 3 is kept.
		r := newPageRig(t, daemon.PageOptions{History: 2 * time.Hour}, false)
		for k := 1; k <= 9; k++ {
			r.mutate = nil
			if k == 5 {
				// Tick 5 is not kept; its outlier must show on tick 7.
				r.mutate = func(est *daemon.Estimate) { est.Outliers |= 1 << 1 }
			}
			r.tick(true)
		}
		h := r.history()
		var seqs []uint64
		for _, row := range h.Rows {
			seqs = append(seqs, row.Seq)
		}
		if fmt.Sprint(seqs) != "[1 4 7]" {
			t.Fatalf("rows %v, want [1 4 7]", seqs)
		}
		if f := int(f64(h.Rows[2].Out[1][5])); f&2 == 0 {
			t.Errorf("row of tick 7 has flags %d for hx_outlet, want the outlier of tick 5 (2) carried over", f)
		}
		if f := int(f64(h.Rows[1].Out[1][5])); f&2 != 0 {
			t.Errorf("row of tick 4 has flags %d for hx_outlet, want no outlier", f)
		}
	})
}

// sseEvent is one Server-Sent Event.
type sseEvent struct {
	id, event string
	data      []byte
	at        time.Time
}

// readEvents reads the events of an /events response into ch until the body
// ends.
func readEvents(body io.Reader, ch chan<- sseEvent) {
	defer close(ch)
	sc := bufio.NewScanner(body)
	// An update carries every row since the client's last, up to the whole
	// ring: in TestPageSlowClient, whose loop ticks as fast as it can, that
	// was seen past 16 MiB on one line, which ended the healthy stream.
	sc.Buffer(make([]byte, 0, 1<<16), 1<<28)
	var ev sseEvent
	for sc.Scan() {
		line := sc.Text()
		switch {
		case line == "":
			if ev.data != nil {
				ev.at = time.Now()
				ch <- ev
			}
			ev = sseEvent{}
		case strings.HasPrefix(line, "id: "):
			ev.id = line[4:]
		case strings.HasPrefix(line, "event: "):
			ev.event = line[7:]
		case strings.HasPrefix(line, "data: "):
			ev.data = append(ev.data, line[6:]...)
		}
	}
}

// openEvents opens /events with the query and returns the channel of its
// events; the stream closes with the test.
func (r *pageRig) openEvents(query string, header http.Header) <-chan sseEvent {
	r.t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	r.t.Cleanup(cancel)
	req, err := http.NewRequestWithContext(ctx, "GET", r.srv.URL+"/events?estimator="+r.plant.Name+query, nil)
	if err != nil {
		r.t.Fatal(err)
	}
	for k, v := range header {
		req.Header[k] = v
	}
	res, err := http.DefaultClient.Do(req)
	if err != nil {
		r.t.Fatal(err)
	}
	if res.StatusCode != http.StatusOK || res.Header.Get("Content-Type") != "text/event-stream" {
		r.t.Fatalf("events: %s, %s", res.Status, res.Header.Get("Content-Type"))
	}
	ch := make(chan sseEvent, 1024)
	go func() {
		defer res.Body.Close()
		readEvents(res.Body, ch)
	}()
	return ch
}

func decodeUpdate(t testing.TB, ev sseEvent) pageUpdate {
	t.Helper()
	var u pageUpdate
	if ev.event != "tick" {
		t.Fatalf("event %q, want tick", ev.event)
	}
	if err := json.Unmarshal(ev.data, &u); err != nil {
		t.Fatalf("%v in %s", err, ev.data)
	}
	if id, err := strconv.ParseUint(ev.id, 10, 64); err != nil || id != u.Seq {
		t.Fatalf("event id %q, want the update's seq %d", ev.id, u.Seq)
	}
	return u
}

// waitStreams polls until the page has n open streams.
func waitStreams(t testing.TB, p *daemon.Page, n int) {
	t.Helper()
	deadline := time.Now().Add(10 * time.Second)
	for p.Stats().Clients != n {
		if time.Now().After(deadline) {
			t.Fatalf("%d streams open, want %d", p.Stats().Clients, n)
		}
		time.Sleep(time.Millisecond)
	}
}

// TestPageEventsThrottledAndComplete drives ticks in bursts of 20, each as
// soon as the previous update arrived, and checks that a client gets at most
// 10 updates a second (the default rate) and yet every tick, in order, once.
func TestPageEventsThrottledAndComplete(t *testing.T) {
	r := newPageRig(t, daemon.PageOptions{}, false)
	r.tick(true)
	ch := r.openEvents("", nil) // from the next tick on
	waitStreams(t, r.page, 1)
	var got []uint64
	var first, lastAt time.Time
	events := 0
	for events < 8 {
		// A burst of 20 ticks, then wait for the update: without the
		// throttle each burst would be sent at once.
		for range 20 {
			r.tick(true)
		}
		var ev sseEvent
		select {
		case e, ok := <-ch:
			if !ok {
				t.Fatal("stream ended")
			}
			ev = e
		case <-time.After(10 * time.Second):
			t.Fatalf("no update in 10 s after %d", events)
		}
		u := decodeUpdate(t, ev)
		if events == 0 {
			first = ev.at
		}
		lastAt = ev.at
		events++
		for _, row := range u.Rows {
			got = append(got, row.Seq)
		}
	}
	// 8 updates at most 10 a second span at least 7 × 100 ms; the
	// client's clock reads arrival, which can bunch by the scheduling of
	// its goroutine, so allow 30 ms each.
	if span := lastAt.Sub(first); span < 7*70*time.Millisecond {
		t.Errorf("8 updates in %v, faster than 10 a second", span)
	}
	for i, s := range got {
		if s != uint64(i+2) {
			t.Fatalf("update rows %v…: row %d has seq %d, want %d (every tick once, in order)", got[:min(len(got), 20)], i, s, i+2)
		}
	}
}

// TestPageEventsResume checks where a stream starts: after ?since, after
// the Last-Event-ID of a reconnecting browser (which wins), with a gap flag
// when the rows asked for have left the ring, and from the oldest row with
// a reset flag for a client that saw ticks this page never had (a previous
// run of the daemon).
func TestPageEventsResume(t *testing.T) {
	r := newPageRig(t, daemon.PageOptions{History: 20 * time.Second}, false)
	for range 30 {
		r.tick(true)
	}
	cases := []struct {
		name   string
		query  string
		header http.Header
		first  uint64
		gap    bool
	}{
		{"since", "&since=25", nil, 26, false},
		{"last-event-id wins", "&since=5", http.Header{"Last-Event-Id": {"28"}}, 29, false},
		{"gap", "&since=3", nil, 11, true}, // the ring holds 11…30
		{"restarted", "&since=31", nil, 11, true},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			ch := r.openEvents(c.query, c.header)
			ev, ok := <-ch
			if !ok {
				t.Fatal("stream ended")
			}
			u := decodeUpdate(t, ev)
			if u.Reset != (c.name == "restarted") {
				t.Errorf("reset %v", u.Reset)
			}
			if len(u.Rows) == 0 || u.Rows[0].Seq != c.first || u.Rows[len(u.Rows)-1].Seq != 30 || u.Gap != c.gap {
				t.Fatalf("first update: %d rows from %d, gap %v; want rows %d…30, gap %v", len(u.Rows), u.Rows[0].Seq, u.Gap, c.first, c.gap)
			}
			// 30 ticks offered the input and both outputs once each.
			if s := u.Samples["tank_outlet"]; s["received"] != 30 {
				t.Errorf("samples %v, want 30 received for tank_outlet", u.Samples)
			}
		})
	}
	if s := r.page.Stats(); s.Gaps != 2 {
		t.Errorf("stats %+v, want 2 gaps", s)
	}
	res, body := r.get("/events?estimator=" + r.plant.Name + "&since=soon")
	if res.StatusCode != http.StatusBadRequest {
		t.Errorf("since=soon: %s %s, want 400", res.Status, body)
	}
}

// TestPageSlowClient checks that a client which stops reading holds up
// neither the ticks nor the other clients, and is dropped once a write has
// waited WriteTimeout.
func TestPageSlowClient(t *testing.T) {
	// 50 minutes of 1 s ticks: 3000 rows, every tick kept.
	// The write timeout is long enough that a healthy reader on a loaded
	// machine (CI runs packages side by side) is never taken for a stalled
	// one, short enough to keep the test quick.
	r := newPageRig(t, daemon.PageOptions{History: 50 * time.Minute, WriteTimeout: 2 * time.Second}, false)
	r.tick(true)

	// The stalled client: a raw connection with a small receive buffer
	// that sends its request and never reads.
	d := net.Dialer{Control: func(_, _ string, c syscall.RawConn) error {
		var serr error
		err := c.Control(func(fd uintptr) { serr = syscall.SetsockoptInt(int(fd), syscall.SOL_SOCKET, syscall.SO_RCVBUF, 4096) })
		return errors.Join(err, serr)
	}}
	conn, err := d.Dial("tcp", r.srv.Listener.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	fmt.Fprintf(conn, "GET /events?estimator=%s&since=0 HTTP/1.1\r\nHost: x\r\n\r\n", r.plant.Name)
	waitStreams(t, r.page, 1)

	healthy := r.openEvents("", nil)
	waitStreams(t, r.page, 2)

	// Ticks go on: each update to the stalled client carries every row
	// since its last, up to the ring (3000 rows), which soon fills its
	// socket buffers; its write then waits, and after 2 s it is
	// dropped. If Observe waited for a client, this loop would hang.
	deadline := time.Now().Add(60 * time.Second)
	var healthySeq uint64
	for r.page.Stats().Dropped == 0 {
		if time.Now().After(deadline) {
			t.Fatalf("stalled client not dropped after %d ticks: %+v", r.k, r.page.Stats())
		}
		r.tick(true)
		for drained := false; !drained; {
			select {
			case ev := <-healthy:
				healthySeq = decodeUpdate(t, ev).Seq
			default:
				drained = true
			}
		}
	}
	waitStreams(t, r.page, 1)
	// The healthy client is still served, up to the latest tick.
	last := uint64(r.k)
	for healthySeq < last {
		select {
		case ev, ok := <-healthy:
			if !ok {
				t.Fatal("healthy stream ended")
			}
			healthySeq = decodeUpdate(t, ev).Seq
		case <-time.After(10 * time.Second):
			t.Fatalf("healthy client at seq %d, want %d", healthySeq, last)
		}
	}
	t.Logf("stalled client dropped after %d ticks; %+v", r.k, r.page.Stats())
}

// TestPageObserveAllocs asserts that the tick path of the page — a row into
// the ring and a wake-up of two open streams — allocates nothing.
func TestPageObserveAllocs(t *testing.T) {
	r := newPageRig(t, daemon.PageOptions{}, true)
	for range 350 { // wrap the ring
		r.tick(true)
	}
	r.openEvents("", nil)
	r.openEvents("", nil)
	waitStreams(t, r.page, 2)
	est, cand := r.est, r.cand
	seq := est.Seq
	tt := daemon.TickTiming{Lateness: time.Millisecond, Compute: time.Microsecond}
	allocs := testing.AllocsPerRun(1000, func() {
		seq++
		est.Seq, cand.Seq = seq, seq
		est.Time = est.Time.Add(time.Second)
		r.page.Observe("hotwater-loop", est, cand, tt)
	})
	if allocs != 0 {
		t.Errorf("%v allocations per Observe, want 0", allocs)
	}
}

// TestPageRoutes checks the page's files and its refusals.
func TestPageRoutes(t *testing.T) {
	audit := []daemon.AuditEntry{
		{Time: pageT0, Estimator: "hotwater-loop", Action: "load", Note: "first"},
		{Time: pageT0.Add(time.Minute), Estimator: "hotwater-loop", Action: "promote", Note: "second"},
	}
	r := newPageRig(t, daemon.PageOptions{AuditTail: func(name string, n int) []daemon.AuditEntry {
		if name != "hotwater-loop" || n <= 0 {
			return nil
		}
		return audit
	}}, false)
	cases := []struct {
		path, ctype string
		code        int
		has         string
	}{
		{"/", "text/html; charset=utf-8", 200, `<script src="/page/page.js" defer></script>`},
		{"/page/page.js", "text/javascript; charset=utf-8", 200, "new EventSource("},
		{"/page/page.css", "text/css; charset=utf-8", 200, "--tracking:"},
		{"/page/vendor/uplot/uPlot.iife.min.js", "text/javascript; charset=utf-8", 200, "uPlot"},
		{"/page/vendor/uplot/LICENSE", "", 200, "MIT"},
		{"/api/audit?estimator=hotwater-loop", "application/json", 200, `"action":"promote"`},
		{"/api/history?estimator=other", "text/plain; charset=utf-8", 404, `no estimator "other"`},
		{"/events?estimator=", "text/plain; charset=utf-8", 404, "no estimator"},
		{"/page/nothing.js", "", 404, ""},
	}
	for _, c := range cases {
		res, body := r.get(c.path)
		if res.StatusCode != c.code || (c.ctype != "" && res.Header.Get("Content-Type") != c.ctype) || !strings.Contains(string(body), c.has) {
			t.Errorf("GET %s: %s %q, %d bytes; want %d %q containing %q", c.path, res.Status, res.Header.Get("Content-Type"), len(body), c.code, c.ctype, c.has)
		}
		if c.code == 200 && !strings.HasPrefix(c.path, "/api/") && !strings.Contains(res.Header.Get("Content-Security-Policy"), "script-src 'self'") {
			t.Errorf("GET %s: no content security policy", c.path)
		}
	}
	_, body := r.get("/api/audit?estimator=hotwater-loop")
	var got []daemon.AuditEntry
	if err := json.Unmarshal(body, &got); err != nil {
		t.Fatal(err)
	}
	if len(got) != 2 || got[0].Note != "second" || got[1].Note != "first" {
		t.Errorf("audit %+v, want newest first", got)
	}
}

// TestNewPageRefuses checks the construction errors.
func TestNewPageRefuses(t *testing.T) {
	plant, _ := pageDemo(t)
	cases := []struct {
		name string
		ests []daemon.PageEstimator
		want string
	}{
		{"no plant", []daemon.PageEstimator{{}}, "estimator 0 has no plant"},
		{"twice", []daemon.PageEstimator{{Plant: plant}, {Plant: plant}}, `two estimators named "hotwater-loop"`},
	}
	for _, c := range cases {
		if _, err := daemon.NewPage(c.ests, daemon.PageOptions{}); err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%s: error %v, want %q", c.name, err, c.want)
		}
	}
}

// BenchmarkPageObserve measures the page's part of a tick: one row of the
// demo plant (2 outputs, 4 states, 1 input, with a candidate lane) into the
// ring and the wake-up of one open stream.
func BenchmarkPageObserve(b *testing.B) {
	r := newPageRig(b, daemon.PageOptions{}, true)
	for range 10 {
		r.tick(true)
	}
	r.openEvents("", nil)
	waitStreams(b, r.page, 1)
	est, cand := r.est, r.cand
	tt := daemon.TickTiming{Lateness: time.Millisecond, Compute: time.Microsecond}
	b.ReportAllocs()
	for b.Loop() {
		est.Seq++
		cand.Seq = est.Seq
		r.page.Observe("hotwater-loop", est, cand, tt)
	}
}

// ExampleNewPage serves the live page of one estimator on a mux and records
// one tick; a browser at "/" shows it, and /api/history returns it.
func ExampleNewPage() {
	plant, err := config.LoadPlant(filepath.Join("..", "testdata", "plants", "hotwater-loop.yaml"))
	if err != nil {
		fmt.Println(err)
		return
	}
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		fmt.Println(err)
		return
	}
	active, err := estimator.Prepare(plant.Model, gains.Set(gains.Active).Set, plant.Gate)
	if err != nil {
		fmt.Println(err)
		return
	}
	engine := daemon.NewEngine(plant, active, daemon.EngineOptions{})

	page, err := daemon.NewPage([]daemon.PageEstimator{{Plant: plant, Gains: func() *config.GainsFile { return gains }}}, daemon.PageOptions{})
	if err != nil {
		fmt.Println(err)
		return
	}
	mux := http.NewServeMux()
	page.Register(mux)

	// One tick with the heater power and both temperatures at their
	// operating point (signals: the input, then the outputs).
	at := time.Date(2026, 12, 2, 6, 0, 1, 0, time.UTC)
	engine.Offer(0, 6.0, at, at)
	engine.Offer(1, 61.0, at, at)
	engine.Offer(2, 54.4, at, at)
	est := engine.NewEstimate()
	engine.Tick(at, est)
	page.Observe(plant.Name, est, nil, daemon.TickTiming{Lateness: 2 * time.Millisecond})

	rec := httptest.NewRecorder()
	mux.ServeHTTP(rec, httptest.NewRequest("GET", "/api/history?estimator=hotwater-loop", nil))
	var h struct {
		Rows []struct {
			Seq    uint64
			Status string
			Gains  string
		}
	}
	if err := json.Unmarshal(rec.Body.Bytes(), &h); err != nil {
		fmt.Println(err)
		return
	}
	fmt.Println(len(h.Rows), h.Rows[0].Seq, h.Rows[0].Status, h.Rows[0].Gains)
	// Output: 1 1 tracking poles-prediction
}
