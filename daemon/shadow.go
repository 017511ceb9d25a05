package daemon

import (
	"fmt"
	"math"
	"sync"
	"sync/atomic"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// ShadowSubject returns the subject a candidate gain set's estimates are
// published on: the estimate subject with "shadow" before its last token,
// "<publish prefix>.shadow.estimate" (by default
// surmise.<name>.shadow.estimate).
func ShadowSubject(estimateSubject string) string {
	const suffix = ".estimate"
	if len(estimateSubject) > len(suffix) && estimateSubject[len(estimateSubject)-len(suffix):] == suffix {
		return estimateSubject[:len(estimateSubject)-len(suffix)] + ".shadow" + suffix
	}
	return estimateSubject + ".shadow"
}

// laneOpKind is what a laneOp does.
type laneOpKind uint8

const (
	opActive    laneOpKind = iota + 1 // the active lane switches to prep (state carried over)
	opCandidate                       // the candidate lane is replaced by one running prep, or removed (nil)
	opPromote                         // the candidate becomes active; adopt says how
	opReset                           // every lane restarts at x with covariance p0
)

// laneOp is one change of an engine's lanes asked for by the commissioning
// path (Commissioner). Unlike UseGains, SetCandidate and Reset, whose
// requests of one kind replace each other until the next tick, laneOps are
// queued and applied in the order they were asked for, all of them, at the
// start of the next tick: a promotion followed by a roll-back within one
// tick period ends where the roll-back says.
type laneOp struct {
	kind laneOpKind
	prep *estimator.Prepared // opActive, opCandidate (nil: no candidate)
	// adopt (opPromote): the candidate lane itself becomes the active
	// lane, with its state, covariance and windows; otherwise the active
	// lane switches to the candidate's gains and keeps its own state.
	adopt bool
	// x and p0 (opReset): the absolute state (nil: the operating point)
	// and covariance (nil: the plant's initial covariance, else the gain
	// set's steady state).
	x  []float64
	p0 mat.Symmetric
}

// laneOps is an engine's queue of laneOps. pending lets a tick with nothing
// queued pass with one atomic load.
type laneOps struct {
	pending atomic.Bool
	mu      sync.Mutex
	ops     []laneOp
}

// enqueue queues ops, to be applied together, in order, at the start of the
// next tick. It may be called from any goroutine.
func (e *Engine) enqueue(ops ...laneOp) {
	e.ops.mu.Lock()
	e.ops.ops = append(e.ops.ops, ops...)
	e.ops.pending.Store(true)
	e.ops.mu.Unlock()
}

// applyOps applies the queued laneOps; tick goroutine only, between ticks.
func (e *Engine) applyOps() {
	if !e.ops.pending.Load() {
		return
	}
	e.ops.mu.Lock()
	ops := e.ops.ops
	e.ops.ops = nil
	e.ops.pending.Store(false)
	e.ops.mu.Unlock()
	for i := range ops {
		e.applyOp(&ops[i])
	}
}

func (e *Engine) applyOp(op *laneOp) {
	switch op.kind {
	case opActive:
		e.active.use(op.prep)
		e.rebind()
	case opCandidate:
		old := e.cand
		e.cand = nil
		if op.prep != nil {
			l := e.newLane(op.prep)
			if e.seq > 0 {
				// Start from the active estimate rather than the
				// plant's initial state: the two lanes are compared
				// from the first tick, not after the candidate has
				// caught up from far away.
				l.f.Reset(e.active.x, nil)
			}
			e.cand = l
		}
		e.rebind(old)
	case opPromote:
		if e.cand == nil {
			return
		}
		old := e.active
		if op.adopt {
			e.active, e.cand = e.cand, nil
			e.rebind(old)
			return
		}
		cand := e.cand
		e.cand = nil
		e.active.use(cand.prep)
		e.rebind(cand)
	case opReset:
		p0 := op.p0
		if p0 == nil {
			p0 = e.p0
		}
		for _, l := range []*lane{e.active, e.cand} {
			if l == nil {
				continue
			}
			l.reset(op.x, p0)
		}
	}
}

// shadowLane is the tick side of an estimator's candidate lane: its
// estimate and its JSON, reused from tick to tick.
type shadowLane struct {
	subject string
	est     *Estimate
	payload []byte
	numbers NumberCache
}

// afterTick publishes the candidate lane's estimate of the tick just run on
// the shadow subject (when there is a candidate and the bus is connected)
// and shows both lanes to the commissioner. It runs on the tick goroutine
// after the active estimate was published, and allocates nothing.
func (e *Estimator) afterTick(connected bool) {
	var cand *Estimate
	if e.shadow.est != nil && e.engine.CandidateTo(e.shadow.est) {
		cand = e.shadow.est
		if connected {
			e.shadow.payload = cand.AppendJSONWith(e.shadow.payload[:0], &e.shadow.numbers)
			_ = e.d.bus.Conn().Publish(e.shadow.subject, e.shadow.payload)
		}
	}
	if e.comm != nil {
		e.comm.observe(e.est, cand)
	}
}

// PromoteRequest is the body of a promote request.
type PromoteRequest struct {
	// Transfer is KeepState (the default when empty) or AdoptState.
	Transfer Transfer `json:"transfer"`
	// Confirm applies an AdoptState promotion; without it the reply
	// reports the jump and nothing changes.
	Confirm bool `json:"confirm"`
}

// PromoteReply is the result of a promote request.
type PromoteReply struct {
	// Applied is false for an AdoptState request without Confirm.
	Applied  bool     `json:"applied"`
	Transfer Transfer `json:"transfer"`
	Active   SetRef   `json:"active"`   // the active set after the promotion (to be, when not applied)
	Previous SetRef   `json:"previous"` // the set it replaces, the target of a roll-back
	// Jump is the difference between the candidate's and the active
	// estimate at the latest tick (AdoptState only).
	Jump *Jump  `json:"jump,omitempty"`
	Note string `json:"note"`
}

// Jump is the difference between two estimates of the same tick.
type Jump struct {
	Seq    uint64      `json:"seq"`  // the tick
	Norm   float64     `json:"norm"` // ‖x̂_cand − x̂_act‖, Euclidean, in the states' mixed units
	States []StateJump `json:"states"`
}

// StateJump is one state's part of a Jump.
type StateJump struct {
	Name       string  `json:"name"`
	Unit       string  `json:"unit,omitempty"`
	Active     float64 `json:"active"`
	Candidate  float64 `json:"candidate"`
	Difference float64 `json:"difference"` // candidate − active
	// Sigmas is Difference over the active estimate's standard deviation;
	// null when that is unknown.
	Sigmas Number `json:"sigmas"`
}

// Promote makes the candidate set active (see PromoteRequest). It is refused
// when no candidate runs, within the minimum dwell time of the previous swap,
// and for AdoptState before the candidate has run a tick. The previous active
// set becomes the target of Rollback and the shadow lane stops.
func (c *Commissioner) Promote(req PromoteRequest, who Origin) (*PromoteReply, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	tr := req.Transfer
	if tr == "" {
		tr = KeepState
	}
	if tr != KeepState && tr != AdoptState {
		return nil, refusal(CodeBadRequest, "transfer %q: want %q or %q", req.Transfer, KeepState, AdoptState)
	}
	if c.cand == nil {
		return nil, refusal(CodeRefused, "no candidate gain set runs in shadow: nothing to promote")
	}
	if err := c.checkDwell(); err != nil {
		return nil, err
	}
	reply := &PromoteReply{Transfer: tr, Active: c.cand.ref(c.fingerprint), Previous: c.active.ref(c.fingerprint)}
	if tr == AdoptState {
		j, err := c.jump()
		if err != nil {
			return nil, err
		}
		reply.Jump = j
		if !req.Confirm {
			reply.Note = fmt.Sprintf("not applied: adopting the candidate's state would move the estimate by %.6g (see the states); repeat with confirm to apply", j.Norm)
			return reply, nil
		}
	}
	c.eng.enqueue(laneOp{kind: opPromote, adopt: tr == AdoptState})
	old := c.active
	c.prev, c.active, c.cand = old, c.cand, nil
	c.lastSwap = c.now()
	reply.Applied = true
	if tr == AdoptState {
		reply.Note = fmt.Sprintf("%s promoted with its own state (the estimate moved by %.6g); shadow stopped; rollback returns %s", c.active.named.Set.Name, reply.Jump.Norm, old.named.Set.Name)
	} else {
		reply.Note = fmt.Sprintf("%s promoted, state carried over; shadow stopped; rollback returns %s", c.active.named.Set.Name, old.named.Set.Name)
	}
	e := AuditEntry{Action: "promote", Trigger: TriggerControl, Origin: who.Who, OriginVerified: who.Verified, ClaimedBy: who.Claimed,
		OldActive: old.ref(c.fingerprint), NewActive: c.active.ref(c.fingerprint),
		OldCandidate: refOrNil(c.active, c.fingerprint), Transfer: string(tr), Note: reply.Note}
	if reply.Jump != nil {
		norm := reply.Jump.Norm
		e.Jump = &norm
	}
	c.record(e)
	c.log.Info("candidate promoted", "estimator", c.name, "set", c.active.named.Set.Name, "previous", old.named.Set.Name, "transfer", string(tr), "origin", who.Who)
	c.publishGains()
	return reply, nil
}

// checkDwell refuses a swap within the minimum dwell time of the previous one.
func (c *Commissioner) checkDwell() *CommissionError {
	if c.dwell <= 0 || c.lastSwap.IsZero() {
		return nil
	}
	if since := c.now().Sub(c.lastSwap); since < c.dwell {
		return refusal(CodeRefused, "the active set changed %.3g s ago and the minimum dwell time between swaps is %v: try again in %.3g s",
			since.Seconds(), c.dwell, (c.dwell - since).Seconds())
	}
	return nil
}

// jump compares the latest ticks of the candidate and the active lane.
func (c *Commissioner) jump() (*Jump, *CommissionError) {
	c.obsMu.Lock()
	defer c.obsMu.Unlock()
	a, k := &c.obs[0], &c.obs[1]
	if !a.has || !k.has || k.gains != c.cand.named.Set.Name || a.seq != k.seq {
		return nil, refusal(CodeRefused, "the candidate %s has not run a tick yet: no state to adopt", c.cand.named.Set.Name)
	}
	return a.jumpTo(k.x), nil
}

// jumpTo returns the jump from the lane's latest estimate to the absolute
// state x.
func (v *laneView) jumpTo(x []float64) *Jump {
	j := &Jump{Seq: v.seq}
	var sq float64
	for i := range v.x {
		d := x[i] - v.x[i]
		sq += d * d
		s := StateJump{Name: v.names[i], Unit: v.units[i], Active: v.x[i], Candidate: x[i], Difference: d, Sigmas: Number(math.NaN())}
		if sd := v.std[i]; sd > 0 {
			s.Sigmas = Number(d / sd)
		}
		j.States = append(j.States, s)
	}
	j.Norm = math.Sqrt(sq)
	return j
}

// RollbackReply is the result of a rollback request.
type RollbackReply struct {
	Active   SetRef `json:"active"`   // the set that runs again
	Previous SetRef `json:"previous"` // the set it replaces (a second roll-back returns it)
	Note     string `json:"note"`
}

// Rollback makes the previous active set active again, state carried over.
// It is refused when there is none and within the minimum dwell time of the
// previous swap. A candidate of the same name stops.
func (c *Commissioner) Rollback(who Origin) (*RollbackReply, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.prev == nil {
		return nil, refusal(CodeRefused, "no previous active set: nothing to roll back to")
	}
	if err := c.checkDwell(); err != nil {
		return nil, err
	}
	old, back := c.active, c.prev
	ops := []laneOp{{kind: opActive, prep: back.prep}}
	oldCand := c.cand
	if c.cand != nil && c.cand.named.Set.Name == back.named.Set.Name {
		ops = append(ops, laneOp{kind: opCandidate})
		c.cand = nil
	}
	c.eng.enqueue(ops...)
	c.active, c.prev = back, old
	c.lastSwap = c.now()
	reply := &RollbackReply{Active: back.ref(c.fingerprint), Previous: old.ref(c.fingerprint),
		Note: fmt.Sprintf("%s is active again, state carried over; rollback again returns %s", back.named.Set.Name, old.named.Set.Name)}
	c.record(AuditEntry{Action: "rollback", Trigger: TriggerControl, Origin: who.Who, OriginVerified: who.Verified, ClaimedBy: who.Claimed,
		OldActive: old.ref(c.fingerprint), NewActive: back.ref(c.fingerprint),
		OldCandidate: refOrNil(oldCand, c.fingerprint), NewCandidate: refOrNil(c.cand, c.fingerprint), Note: reply.Note})
	c.log.Info("gains rolled back", "estimator", c.name, "set", back.named.Set.Name, "replaced", old.named.Set.Name, "origin", who.Who)
	c.publishGains()
	return reply, nil
}

// observe records the latest tick of the active lane and, when cand is not
// nil, of the candidate lane, for status and the jump of an adopt-state
// promotion. It is called on the tick goroutine after each tick and
// allocates nothing.
func (c *Commissioner) observe(act, cand *Estimate) {
	c.obsMu.Lock()
	was := [2]Status{c.obs[0].status, c.obs[1].status}
	had := [2]bool{c.obs[0].has, c.obs[1].has}
	c.obs[0].set(act)
	if cand != nil {
		c.obs[1].set(cand)
	} else {
		c.obs[1].has = false
	}
	c.obsMu.Unlock()
	c.divergence(act, "active", had[0] && was[0] == StatusDiverged)
	if cand != nil {
		c.divergence(cand, "shadow", had[1] && was[1] == StatusDiverged)
	}
}

// divergence logs and audits a lane that has just diverged (wasDiverged is
// false) and one the engine has just re-initialised. Both are rare; the
// steady tick passes through without allocating.
func (c *Commissioner) divergence(est *Estimate, lane string, wasDiverged bool) {
	ref := SetRef{Name: est.Gains, Form: est.Form, Fingerprint: est.Fingerprint}
	switch {
	case est.Status == StatusDiverged && !wasDiverged:
		note := fmt.Sprintf("%s lane diverged: %s; re-initialising from the plant's initial condition in %d ticks", lane, est.Diverged, DivergedHold)
		c.log.Error("estimate diverged", "estimator", c.name, "lane", lane, "gains", est.Gains, "why", est.Diverged, "reinitialise_after_ticks", DivergedHold)
		c.record(AuditEntry{Action: "diverged", Trigger: "engine", OldActive: ref, NewActive: ref, Note: note})
	case est.Reinitialised:
		c.log.Warn("estimator re-initialised after diverging", "estimator", c.name, "lane", lane, "gains", est.Gains)
		c.record(AuditEntry{Action: "reinitialise", Trigger: "engine", OldActive: ref, NewActive: ref,
			Note: lane + " lane re-initialised from the plant's initial condition after diverging"})
	}
}

func (v *laneView) set(est *Estimate) {
	v.has = true
	v.gains, v.seq, v.time, v.status = est.Gains, est.Seq, est.Time, est.Status
	v.nisMean, v.lo, v.hi = est.NISMean, est.NISBand[0], est.NISBand[1]
	for i := range est.States {
		s := &est.States[i]
		v.x[i], v.std[i], v.names[i], v.units[i] = s.Value, s.Std, s.Name, s.Unit
	}
}
