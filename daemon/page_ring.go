package daemon

import (
	"math"
	"time"

	"surmise/estimator"
)

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
	// The sensor watch's indicators of the active lane, per output bit:
	// bias reading high or low, stuck, locked out by the gate.
	biasHi, biasLo, stuck, locked estimator.Pattern

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
	for j := range est.Outputs {
		o := &est.Outputs[j]
		bit := estimator.Pattern(1) << uint(j)
		switch o.Bias {
		case 1:
			r.biasHi |= bit
		case -1:
			r.biasLo |= bit
		}
		if o.Stuck {
			r.stuck |= bit
		}
		if o.LockedOut {
			r.locked |= bit
		}
	}
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
