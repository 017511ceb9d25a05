package daemon

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"
	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// The control service: one NATS micro service named ControlService per
// daemon, with one endpoint per verb whose subject holds the estimator,
//
//	surmise.control.<estimator>.status    no body            → StatusReply
//	surmise.control.<estimator>.load      a gains file       → LoadReply
//	surmise.control.<estimator>.promote   PromoteRequest     → PromoteReply
//	surmise.control.<estimator>.rollback  no body            → RollbackReply
//	surmise.control.<estimator>.reset     ResetRequest       → ResetReply
//
// Replies are JSON. A refused request gets a micro error reply: the
// Nats-Service-Error-Code header holds the code (CodeBadRequest,
// CodeRefused, CodeInvalid), Nats-Service-Error the reason, and the body
// a ControlError. The service answers $SRV.PING, $SRV.INFO and $SRV.STATS
// discovery like every micro service.
const (
	// ControlService is the micro service name.
	ControlService = "surmise"
	// ControlVersion is the version of the control protocol (semantic
	// versioning, as micro requires), not of the program.
	ControlVersion = "1.0.0"
	// ControlRoot is the prefix of every control subject.
	ControlRoot = "surmise.control"
)

// The control verbs, the last token of their subjects.
const (
	VerbStatus   = "status"
	VerbLoad     = "load"
	VerbPromote  = "promote"
	VerbRollback = "rollback"
	VerbReset    = "reset"
)

// Headers of control requests.
const (
	// HeaderSet (load) names the set to run instead of the file's active
	// one.
	HeaderSet = "Surmise-Set"
	// HeaderCandidate (load) names the set to run in shadow instead of the
	// file's candidate; NoCandidate for none.
	HeaderCandidate = "Surmise-Candidate"
	// HeaderSource (load) is the name of the file the gains were read from
	// on the requester's side (`surmise ctl` sends the path it was given):
	// messages about the file name it, with line and column.
	HeaderSource = "Surmise-Source"
	// HeaderOperator is who the requester says it is (`surmise ctl` sends
	// user@host). It is recorded as claimed_by in the audit trail and
	// checked by nothing.
	HeaderOperator = "Surmise-Operator"
	// HeaderRequestInfo is the header a NATS server adds to a request that
	// crosses a service import between accounts, with the requesting
	// client's identity as the server knows it.
	HeaderRequestInfo = "Nats-Request-Info"
)

// NoCandidate is the value of HeaderCandidate that runs no shadow set.
const NoCandidate = "none"

// ControlSubject returns the subject of a verb of an estimator.
func ControlSubject(estimator, verb string) string {
	return ControlRoot + "." + estimator + "." + verb
}

// ControlError is the body of a refused control request.
type ControlError struct {
	Code   string   `json:"code"`
	Error  string   `json:"error"`
	Detail []string `json:"detail,omitempty"`
}

// StartControl adds the control service for the commissioners' estimators
// to the connection nc and returns it; Stop it before the connection
// closes. See [StartControlIndex]: this is it with a fixed set of
// estimators.
func StartControl(nc *nats.Conn, comms []*Commissioner) (micro.Service, error) {
	idx := NewControlIndex()
	for _, c := range comms {
		idx.Add(c)
	}
	return StartControlIndex(nc, idx)
}

// ControlSchema is where the JSON Schema of the control requests and replies
// is, in the source repository; an endpoint's metadata names the definition
// of its request and reply in it.
const ControlSchema = "daemon/schema/control.schema.json"

// controlEndpoint is one verb of the control service: its handler and what
// `nats micro info surmise` shows of it.
type controlEndpoint struct {
	verb        string
	fn          func(*Commissioner, micro.Request) (any, error)
	description string
	request     string // what the request body is, in words
	reqDef      string // the request's definition in ControlSchema; "" for no body
	replyDef    string
}

var controlEndpoints = []controlEndpoint{
	{VerbStatus, handleStatus, "the estimator's gain sets, latest ticks of both lanes, last reload and recent audit entries",
		"no body", "", "status-reply"},
	{VerbLoad, handleLoad, "load a gains file: checked against the running model, then swapped in between two ticks (not written to disk)",
		"a gains file (YAML); headers Surmise-Set (the set to run), Surmise-Candidate (the set to shadow, or none), Surmise-Source (the file's name, for messages)", "", "load-reply"},
	{VerbPromote, handlePromote, "make the candidate set active; the previous active set becomes the roll-back target",
		`JSON {"transfer": "keep-state"|"adopt-state", "confirm": bool}; empty is keep-state`, "promote-request", "promote-reply"},
	{VerbRollback, handleRollback, "make the previous active set active again, keeping the state",
		"no body", "", "rollback-reply"},
	{VerbReset, handleReset, "restart every lane at the operating point or at a given state",
		`JSON {"state": {name: value}, "std": {name: value}} or {"covariance": [[…]]}; empty is the operating point`, "reset-request", "reset-reply"},
}

// metadata is the endpoint's metadata in the service's $SRV.INFO reply.
func (ep controlEndpoint) metadata(estimator string) map[string]string {
	m := map[string]string{
		"estimator":    estimator,
		"description":  ep.description,
		"request":      ep.request,
		"reply_schema": ControlSchema + "#/$defs/" + ep.replyDef,
		"error_schema": ControlSchema + "#/$defs/error",
	}
	if ep.reqDef != "" {
		m["request_schema"] = ControlSchema + "#/$defs/" + ep.reqDef
	}
	return m
}

// respond sends the reply v, or the error err.
func respond(req micro.Request, v any, err error) {
	if err == nil {
		rerr := req.RespondJSON(v)
		if rerr == nil {
			return
		}
		err = refusal("500", "reply not sent: %v", rerr)
	}
	var ce *CommissionError
	if !errors.As(err, &ce) {
		ce = &CommissionError{Code: "500", Reason: err.Error()}
	}
	body, _ := json.Marshal(ControlError{Code: ce.Code, Error: ce.Reason, Detail: ce.Detail})
	// A header value is one line.
	desc := strings.ReplaceAll(ce.Reason, "\n", " ")
	_ = req.Error(ce.Code, desc, body)
}

// importReplyPrefix begins the reply subject of a request that reached the
// service through a service import: the server replaces the requester's
// reply subject with one of its own, under this prefix.
const importReplyPrefix = "_R_."

// RequestOrigin says who sent a control request, as far as the bus tells.
//
// A request that came through a service import from another account has a
// reply subject the server made (importReplyPrefix) and a Nats-Request-Info
// header the server wrote, replacing any the client sent: that identity is
// the origin, Verified. Anywhere else a client can write the header itself,
// so a header on a request that did not come through an import is only a
// claim: it goes to Claimed, marked as such, and the origin is the reply
// subject, which names the requesting connection's inbox. The
// Surmise-Operator header goes to Claimed too; nothing checks it.
func RequestOrigin(h micro.Headers, reply string) Origin {
	o := Origin{Claimed: h.Get(HeaderOperator)}
	if raw := h.Get(HeaderRequestInfo); raw != "" {
		var ci struct {
			Account string `json:"acc"`
			User    string `json:"user"`
			Name    string `json:"name"`
			Host    string `json:"host"`
			ID      uint64 `json:"id"`
			Server  string `json:"server"`
		}
		if err := json.Unmarshal([]byte(raw), &ci); err == nil {
			var parts []string
			for _, kv := range [][2]string{{"account", ci.Account}, {"user", ci.User}, {"client", ci.Name}, {"host", ci.Host}, {"server", ci.Server}} {
				if kv[1] != "" {
					parts = append(parts, kv[0]+"="+kv[1])
				}
			}
			if ci.ID != 0 {
				parts = append(parts, fmt.Sprintf("cid=%d", ci.ID))
			}
			if len(parts) > 0 {
				info := "request-info: " + strings.Join(parts, " ")
				if strings.HasPrefix(reply, importReplyPrefix) {
					o.Who, o.Verified = info, true
					return o
				}
				claim := "unverified " + info
				if o.Claimed != "" {
					claim = o.Claimed + "; " + claim
				}
				o.Claimed = claim
			}
		}
	}
	o.Who = "reply-subject: " + reply
	return o
}

func origin(req micro.Request) Origin { return RequestOrigin(req.Headers(), req.Reply()) }

// decodeBody decodes a JSON request body strictly into v; an empty body
// leaves v as it is.
func decodeBody(data []byte, v any) error {
	if len(bytes.TrimSpace(data)) == 0 {
		return nil
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return refusal(CodeBadRequest, "request body: %v", err)
	}
	if dec.More() {
		return refusal(CodeBadRequest, "request body: more than one JSON value")
	}
	return nil
}

func handleStatus(c *Commissioner, req micro.Request) (any, error) {
	return c.Status(), nil
}

func handleLoad(c *Commissioner, req micro.Request) (any, error) {
	data := req.Data()
	if len(bytes.TrimSpace(data)) == 0 {
		return nil, refusal(CodeBadRequest, "load: the request body must be a gains file")
	}
	var sel Selection
	h := req.Headers()
	sel.Active = h.Get(HeaderSet)
	if vs := h.Values(HeaderCandidate); len(vs) > 0 {
		v := vs[0]
		if v == NoCandidate {
			v = ""
		}
		sel.Candidate = &v
	}
	return c.Load(data, loadSource(h.Get(HeaderSource)), sel, TriggerControl, origin(req))
}

// sentOverBus ends the source of gains a control request sent.
const sentOverBus = " (sent over the bus)"

// loadSource is the source recorded for gains a control request sent: the
// requester's file name (one line, at most 200 bytes) marked as sent over
// the bus, or "control request" without a name.
func loadSource(name string) string {
	name = strings.TrimSpace(strings.Map(func(r rune) rune {
		if r < ' ' || r == 0x7f {
			return -1
		}
		return r
	}, name))
	if name == "" {
		return "control request"
	}
	if len(name) > 200 {
		name = "…" + name[len(name)-200:]
	}
	return name + sentOverBus
}

func handlePromote(c *Commissioner, req micro.Request) (any, error) {
	var pr PromoteRequest
	if err := decodeBody(req.Data(), &pr); err != nil {
		return nil, err
	}
	return c.Promote(pr, origin(req))
}

func handleRollback(c *Commissioner, req micro.Request) (any, error) {
	if err := decodeBody(req.Data(), &struct{}{}); err != nil {
		return nil, err
	}
	return c.Rollback(origin(req))
}

func handleReset(c *Commissioner, req micro.Request) (any, error) {
	var rr ResetRequest
	if err := decodeBody(req.Data(), &rr); err != nil {
		return nil, err
	}
	return c.Reset(rr, origin(req))
}

// ResetRequest is the body of a reset request. Empty, it resets to the
// operating point with the plant's initial covariance.
type ResetRequest struct {
	// State holds absolute values by state name; states not named start
	// at the operating point.
	State map[string]float64 `json:"state,omitempty"`
	// Std holds the standard deviation of every state, by name; or
	// Covariance the full n×n covariance. Neither: the plant's initial
	// covariance (else the gain set's steady state).
	Std        map[string]float64 `json:"std,omitempty"`
	Covariance [][]float64        `json:"covariance,omitempty"`
	// Confirm applies the reset; without it the reply reports the jump of
	// the state it would cause and nothing changes, as for an adopt-state
	// promotion.
	Confirm bool `json:"confirm,omitempty"`
}

// ResetReply is the result of a reset request.
type ResetReply struct {
	// Applied is false for a request without Confirm.
	Applied bool               `json:"applied"`
	State   map[string]float64 `json:"state"` // the absolute state the lanes restart from
	// Jump is the difference between the reset state (its Candidate
	// entries) and the active lane's latest estimate; nil before the first
	// tick or when that estimate has no numbers (diverged).
	Jump *Jump  `json:"jump,omitempty"`
	Note string `json:"note"`
}

// Reset restarts every lane (the active and the shadow one) at the given
// state from the next tick; the NIS windows start again. Values outside a
// state's range in the plant file are refused. Without req.Confirm it only
// reports the jump the reset would cause. It is not held back by the dwell
// time: it changes no gains.
func (c *Commissioner) Reset(req ResetRequest, who Origin) (*ResetReply, error) {
	md := c.plant.Model
	n, _, _ := md.Dims()
	index := map[string]int{}
	for i := 0; i < n; i++ {
		index[signalName(md.States, i, "x")] = i
	}
	var problems []string
	x := make([]float64, n)
	if md.X0 != nil {
		copy(x, md.X0)
	}
	for name, v := range req.State {
		i, ok := index[name]
		switch {
		case !ok:
			problems = append(problems, fmt.Sprintf("state %q: no such state", name))
		case math.IsNaN(v) || math.IsInf(v, 0):
			problems = append(problems, fmt.Sprintf("state %q: %v is not a finite number", name, v))
		case i < len(c.plant.StateRanges) && !c.plant.StateRanges[i].Contains(v):
			r := c.plant.StateRanges[i]
			problems = append(problems, fmt.Sprintf("state %q: %v is outside its range [%v, %v] in the plant file", name, v, r.Min, r.Max))
		default:
			x[i] = v
		}
	}
	var p0 mat.Symmetric
	switch {
	case req.Std != nil && req.Covariance != nil:
		problems = append(problems, "give std or covariance, not both")
	case req.Std != nil:
		d := mat.NewSymDense(n, nil)
		seen := 0
		for name, v := range req.Std {
			i, ok := index[name]
			switch {
			case !ok:
				problems = append(problems, fmt.Sprintf("std %q: no such state", name))
			case !(v > 0) || math.IsInf(v, 0):
				problems = append(problems, fmt.Sprintf("std %q: %v, want a finite positive number", name, v))
			default:
				d.SetSym(i, i, v*v)
				seen++
			}
		}
		if seen != n && len(problems) == 0 {
			var missing []string
			for i := 0; i < n; i++ {
				if _, ok := req.Std[signalName(md.States, i, "x")]; !ok {
					missing = append(missing, signalName(md.States, i, "x"))
				}
			}
			problems = append(problems, "std: give every state's, missing "+strings.Join(missing, ", "))
		}
		p0 = d
	case req.Covariance != nil:
		cov, msg := covarianceOf(req.Covariance, n)
		if msg != "" {
			problems = append(problems, "covariance: "+msg)
		}
		p0 = cov
	}
	if len(problems) > 0 {
		slices.Sort(problems)
		return nil, &CommissionError{Code: CodeBadRequest, Reason: "reset refused", Detail: problems}
	}
	reply := &ResetReply{State: map[string]float64{}, Jump: c.resetJump(x)}
	for name, i := range index {
		reply.State[name] = x[i]
	}
	if !req.Confirm {
		reply.Note = "not applied: repeat with confirm to restart every lane at this state"
		if reply.Jump != nil {
			reply.Note = fmt.Sprintf("not applied: the reset would move the estimate by %.6g (see the states); repeat with confirm to apply", reply.Jump.Norm)
		}
		return reply, nil
	}
	c.mu.Lock()
	defer c.mu.Unlock()
	c.eng.enqueue(laneOp{kind: opReset, x: x, p0: p0})
	reply.Applied = true
	if len(req.State) == 0 {
		reply.Note = "every lane restarts at the operating point"
	} else {
		reply.Note = "every lane restarts at the given state (others at the operating point)"
	}
	c.record(AuditEntry{Action: "reset", Trigger: TriggerControl, Origin: who.Who, OriginVerified: who.Verified, ClaimedBy: who.Claimed,
		OldActive: c.active.ref(c.fingerprint), NewActive: c.active.ref(c.fingerprint),
		OldCandidate: refOrNil(c.cand, c.fingerprint), NewCandidate: refOrNil(c.cand, c.fingerprint),
		Note: reply.Note + ": " + formatState(md, x)})
	c.log.Info("state reset", "estimator", c.name, "state", formatState(md, x), "origin", who.Who)
	return reply, nil
}

// resetJump returns the jump from the active lane's latest estimate to the
// absolute state x, or nil when there is no estimate with numbers yet.
func (c *Commissioner) resetJump(x []float64) *Jump {
	c.obsMu.Lock()
	defer c.obsMu.Unlock()
	a := &c.obs[0]
	if !a.has || a.status == StatusDiverged {
		return nil
	}
	for _, v := range a.x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return nil
		}
	}
	return a.jumpTo(x)
}

// covarianceOf checks a covariance given as rows: n×n, finite, symmetric,
// positive definite.
func covarianceOf(rows [][]float64, n int) (*mat.SymDense, string) {
	if len(rows) != n {
		return nil, fmt.Sprintf("%d rows, want %d", len(rows), n)
	}
	s := mat.NewSymDense(n, nil)
	for i, r := range rows {
		if len(r) != n {
			return nil, fmt.Sprintf("row %d has %d entries, want %d", i, len(r), n)
		}
		for j, v := range r {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return nil, fmt.Sprintf("[%d][%d] is %v, want a finite number", i, j, v)
			}
			if j > i {
				continue
			}
			if w := rows[j][i]; math.Abs(v-w) > 1e-9*math.Max(math.Abs(v), math.Abs(w)) {
				return nil, fmt.Sprintf("not symmetric: [%d][%d] = %v, [%d][%d] = %v", i, j, v, j, i, w)
			}
			s.SetSym(i, j, v)
		}
	}
	var ch mat.Cholesky
	if !ch.Factorize(s) {
		return nil, "not positive definite"
	}
	return s, ""
}

func formatState(md *estimator.Model, x []float64) string {
	parts := make([]string, len(x))
	for i, v := range x {
		parts[i] = fmt.Sprintf("%s=%g", signalName(md.States, i, "x"), v)
	}
	return strings.Join(parts, " ")
}

// LaneStatus is what the latest tick showed of one lane.
type LaneStatus struct {
	Gains   string       `json:"gains"`
	Seq     uint64       `json:"seq"`
	Time    time.Time    `json:"time"`
	Status  string       `json:"status"`
	NISMean Number       `json:"nis_mean"`
	NISBand [2]Number    `json:"nis_band"`
	States  []StateValue `json:"states"`
}

// StateValue is one state of a LaneStatus.
type StateValue struct {
	Name  string `json:"name"`
	Unit  string `json:"unit,omitempty"`
	Value Number `json:"value"`
	Std   Number `json:"std"`
}

func (v *laneView) report() *LaneStatus {
	if !v.has {
		return nil
	}
	s := &LaneStatus{Gains: v.gains, Seq: v.seq, Time: v.time, Status: v.status.String(),
		NISMean: Number(v.nisMean), NISBand: [2]Number{Number(v.lo), Number(v.hi)}}
	for i := range v.x {
		s.States = append(s.States, StateValue{Name: v.names[i], Unit: v.units[i], Value: Number(v.x[i]), Std: Number(v.std[i])})
	}
	return s
}

// StatusReply is the reply to a status request.
type StatusReply struct {
	Estimator string `json:"estimator"`
	// Model is the fingerprint of the running model.
	Model     string  `json:"model_fingerprint"`
	Active    SetRef  `json:"active"`
	Candidate *SetRef `json:"candidate"`
	Previous  *SetRef `json:"previous"` // the target of a roll-back
	// Source and SHA256 say where the gains in effect came from.
	Source     string        `json:"source"`
	SHA256     string        `json:"sha256,omitempty"`
	LastReload *ReloadResult `json:"last_reload"`
	// RestartNeeded says why the plant file on disk cannot be applied
	// without a restart; "" when it can.
	RestartNeeded string  `json:"restart_needed,omitempty"`
	MinDwell      float64 `json:"min_dwell_seconds"`
	DwellLeft     float64 `json:"dwell_remaining_seconds"`
	// Tick and Shadow are the latest tick of the active and the candidate
	// lane; null before the first.
	Tick   *LaneStatus  `json:"tick"`
	Shadow *LaneStatus  `json:"shadow"`
	Audit  []AuditEntry `json:"audit"`
}

// statusAuditTail is how many audit entries a status reply carries.
const statusAuditTail = 10

// Status returns the estimator's commissioning state.
func (c *Commissioner) Status() *StatusReply {
	c.mu.Lock()
	r := &StatusReply{
		Estimator: c.name, Model: c.fingerprint,
		Active: c.active.ref(c.fingerprint), Candidate: refOrNil(c.cand, c.fingerprint), Previous: refOrNil(c.prev, c.fingerprint),
		Source: c.source, SHA256: c.inEffect, LastReload: c.last, RestartNeeded: c.restart,
		MinDwell: c.dwell.Seconds(),
	}
	if c.dwell > 0 && !c.lastSwap.IsZero() {
		r.DwellLeft = max(0, (c.dwell - c.now().Sub(c.lastSwap)).Seconds())
	}
	c.mu.Unlock()
	c.obsMu.Lock()
	r.Tick, r.Shadow = c.obs[0].report(), c.obs[1].report()
	c.obsMu.Unlock()
	if c.audit != nil {
		r.Audit = c.audit.Tail(c.name, statusAuditTail)
	}
	return r
}

// Number is a float64 that JSON writes as null when it is NaN or infinite
// and reads back from null as NaN.
type Number float64

// MarshalJSON writes n, or null.
func (n Number) MarshalJSON() ([]byte, error) {
	return appendFloat(nil, float64(n)), nil
}

// UnmarshalJSON reads a number, or null as NaN.
func (n *Number) UnmarshalJSON(b []byte) error {
	if string(b) == "null" {
		*n = Number(math.NaN())
		return nil
	}
	var f float64
	if err := json.Unmarshal(b, &f); err != nil {
		return fmt.Errorf("number: %w", err)
	}
	*n = Number(f)
	return nil
}
