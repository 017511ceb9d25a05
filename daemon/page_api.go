package daemon

import (
	"encoding/json"
	"fmt"
	"math"
	"math/cmplx"
	"net/http"
	"slices"
	"strconv"
	"time"

	"surmise/config"
)

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
