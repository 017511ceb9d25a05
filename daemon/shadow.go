package daemon

import (
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
			l.f.Reset(op.x, p0)
			l.win.Reset()
			for j := range l.rms {
				l.rms[j].reset()
			}
		}
	}
}

// shadowLane is the tick side of an estimator's candidate lane: its
// estimate and its JSON, reused from tick to tick.
type shadowLane struct {
	subject string
	est     *Estimate
	payload []byte
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
			e.shadow.payload = cand.AppendJSON(e.shadow.payload[:0])
			_ = e.d.bus.Conn().Publish(e.shadow.subject, e.shadow.payload)
		}
	}
	if e.comm != nil {
		e.comm.observe(e.est, cand)
	}
}
