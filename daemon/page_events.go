package daemon

import (
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strconv"
	"time"
)

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
