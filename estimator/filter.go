package estimator

import (
	"fmt"
	"math"
	"math/bits"

	"gonum.org/v1/gonum/mat"
)

// Outcome says what one Step did.
type Outcome struct {
	// Used is the set of outputs whose innovation was kept: present, finite,
	// and not rejected by the gate. The state was corrected with them when
	// Corrected is true.
	Used Pattern
	// Outliers is the set of outputs the gate rejected this tick.
	Outliers Pattern
	// Corrected is true when the state was corrected with the outputs in
	// Used (for the prediction form, the correction enters the next
	// prediction).
	Corrected bool
	// NoGain is true when a fixed gain set has no gain for the pattern Used
	// and the tick only predicted.
	NoGain bool
	// HasNIS is true when NIS and Dof are set: S was known for Used.
	HasNIS bool
	// NIS is the normalised innovation squared rᵀS⁻¹r over Used.
	NIS float64
	// Dof is the number of outputs NIS was computed with.
	Dof int
	// GateReleased is true when the gate was set aside this tick because it
	// had rejected every present output on the GateRelease ticks before.
	GateReleased bool
	// Refusing is true when the gate has rejected every present output on
	// at least GateSuspect consecutive ticks, this one included.
	Refusing bool
	// GateNIS is the NIS of every present output before the gate, clipped at
	// the gate's threshold χ²_GateDof(gate) when the gate refused any of
	// them; GateDof is its number of outputs, 0 when there is none (no
	// output present, or no S known). It is what a consistency judgement
	// should count: a refused innovation is evidence too, and the clip keeps
	// one wild sample from dominating a window.
	GateNIS float64
	GateDof int
}

// GateRelease is the number of consecutive ticks on which the outlier gate
// rejects every present output before the next tick corrects without the
// gate. A gate protects a converged estimate from a bad sample; once the
// estimate itself is far off (a start far from the truth, a plant step the
// model did not foresee) every sample looks like an outlier, and a gate that
// never relents would leave the filter coasting for good. Releasing it after
// a short run of total rejections is common practice in tracking.
const GateRelease = 10

// GateSuspect is the number of consecutive ticks on which the gate rejects
// every present output after which the filter reports itself locked out
// (Outcome.Refusing): from then on its estimate cannot be trusted, whatever
// its windowed NIS says, until a measurement is accepted again.
const GateSuspect = 3

// acquireTol is the margin of the hand-over from an acquisition to the fixed
// gain. The fixed gain takes over as soon as the a priori covariance of the
// acquisition lies below the set's own steady state, P⁻ ⪯ (1 + acquireTol)·P̄
// in the positive semidefinite order (P̄ the steady-state a priori covariance
// of the full-pattern gain), or comes within acquireTol of the Kalman
// filter's steady state, in the same measure as settleTol. The first test is
// what lets a set with deliberately slow poles take over early: the
// fixed-gain recursion P ↦ A_cl·P·A_clᵀ + Q + L·R·Lᵀ is monotone in P, so
// from a P⁻ below P̄ the error covariance of the fixed gain stays below P̄
// (within the margin) with every output present, and the hand-over promises
// nothing the set cannot keep. A Kalman filter's covariance only reaches
// that order at its own steady state, which for a slowly drifting state can
// take many minutes; the hand-over need not wait for it.
const acquireTol = 0.05

// settleTol is how close, relative to the steady state's own standard
// deviations, a propagated covariance must come to the steady state before
// the filter stops propagating it: |P_ij − P̄_ij| ≤ settleTol·√(P̄_ii·P̄_jj)
// for every entry. A step of 0.1 % in a variance is invisible in the
// published σ.
const settleTol = 1e-3

// Filter runs one estimator, tick by tick. Build it with NewFilter; it
// allocates all its buffers there, and Step, the read-outs, Use and Reset
// allocate nothing. A Filter is not safe for concurrent use.
//
// The published estimate after a Step is x̂(k|k) for the current and Kalman
// forms and x̂(k|k−1) for the prediction form, whose correction with y(k)
// enters the prediction of the next tick.
//
// # Covariance
//
// The Kalman form propagates its covariance every tick. A fixed gain set
// prepared for a model with Q and R does too (it is "tracked"), so that the
// σ it publishes, the S its gate judges with and its NIS describe the filter
// as it runs, not only its design-time steady state:
//
//   - Acquisition. From NewFilter or Reset with an initial covariance, and
//     after a gate release, the filter runs as the time-varying Kalman
//     filter of the model's Q and R, from that covariance, until its a
//     priori covariance lies below the set's own steady state or reaches
//     the Kalman filter's (acquireTol); from then on it corrects with the
//     set's fixed gain. The state and the
//     covariance carry over, so the hand-over makes no step. The optimal
//     gain takes a start far from the truth in as few ticks as the data
//     allow, where a fixed gain designed for the steady state (often with
//     deliberately slow poles) would take as long as its slowest pole.
//   - Fixed-gain recursion. With the fixed gain L for the outputs used, the
//     covariance of the error follows the recursion of that gain (not the
//     Kalman one): P⁺ = (I − L·C_s)·P⁻·(I − L·C_s)ᵀ + L·R_s·Lᵀ in the
//     current form, P⁻(k+1) = (A − L·C_s)·P⁻·(A − L·C_s)ᵀ + Q + L·R_s·Lᵀ in
//     the prediction form, A·P·Aᵀ + Q on a tick that only predicts.
//   - Settled. Once the covariance is within settleTol of the steady state
//     of the full-pattern gain (FixedGainCovariance), the filter stops
//     propagating it and uses that steady state, so the steady tick costs
//     no more than a fixed gain without covariance; anything else (a
//     missing output, an outlier, coasting, a reset, a swap of gains)
//     starts the propagation again from the steady state.
//
// A fixed gain set prepared without Q or R publishes the P stored with its
// full-pattern gain, if any, and judges with the S stored with each gain.
type Filter struct {
	pr      *Prepared
	n, m, p int

	x     []float64 // the published estimate, deviation
	xm    []float64 // scratch for the prediction, swapped with x
	pend  []float64 // prediction form: L·r of the last tick, added in the next prediction
	hasP  bool      // pend holds a correction
	uPrev []float64 // u(k−1) − U0
	du    []float64 // u(k) − U0
	first bool      // the next Step does not predict
	// rejected counts consecutive ticks on which the gate rejected every
	// present output; thr is the gate of the current Step (nil: off).
	rejected int
	thr      []float64

	// Covariance of a tracked fixed gain set (see the type's documentation).
	acq     bool // acquiring: the Kalman correction runs
	settled bool // P is the set's steady state and is not propagated
	hasNext bool // pnext holds the a priori P of the next tick

	yhat   []float64 // C·x̂(k|k−1) + D·(u(k) − U0)
	r      []float64 // innovation per output; valid for the outputs in used
	sv     []float64 // S_ii per output; valid for the outputs in used when svOK
	used   Pattern
	svOK   bool          // sv holds S_ii for the outputs in used
	svGain *compiledGain // fixed gains: the gain whose S was used, or nil
	full   Pattern       // all p outputs

	// scratch, sized for all p outputs
	idx  []int
	act  []int
	rs   []float64 // innovation of the active outputs
	z    []float64 // whitened innovation
	chol []float64 // p×p

	// Covariance (Kalman, tracked fixed gains)
	P, Pn []float64 // n×n: the covariance of the published estimate, and scratch
	pnext []float64 // n×n: prediction form, the a priori P of the next tick
	tcl   []float64 // n×n: A − L·C_s
	acqM  []float64 // n×n: scratch of the hand-over test (psdBelow)
	p0    []float64 // the initial covariance; nil when none was given or derived
	cs    []float64 // p×n: the rows of C for the present outputs
	cp    []float64 // p×n: C_s·P⁻
	kt    []float64 // p×n: Kᵀ for the outputs used
	sfull []float64 // p×p: C_s·P⁻·C_sᵀ + R_s for the present outputs
	rr    []float64 // p×p: R for the outputs used
	h     []float64 // p: a row of K·R_s − M·C_sᵀ
}

// tracks reports whether the filter propagates a covariance.
func (f *Filter) tracks() bool { return f.pr.form == Kalman || f.pr.tracked }

// NewFilter returns a filter for the prepared gain set pr starting at the
// absolute state x0 (nil means the operating point X0), taken as the
// estimate x̂(0|−1): the first Step does not predict.
//
// p0 is the initial covariance. When it is nil a Kalman filter starts from
// the steady-state a priori covariance of the set (SteadyStateKalman with
// all outputs) when there is one, else from 10·Q, and a tracked fixed gain
// set starts settled. With p0, a tracked fixed gain set starts acquiring
// (see Filter). Other fixed gains keep p0 for a later switch to a Kalman
// set (see Use). It panics if x0 or p0 has the wrong dimension.
func NewFilter(pr *Prepared, x0 []float64, p0 mat.Symmetric) *Filter {
	n, m, p := pr.n, pr.m, pr.p
	f := &Filter{
		pr: pr, n: n, m: m, p: p,
		x: make([]float64, n), xm: make([]float64, n), pend: make([]float64, n),
		uPrev: make([]float64, m), du: make([]float64, m),
		yhat: make([]float64, p), r: make([]float64, p), sv: make([]float64, p),
		idx: make([]int, p), act: make([]int, p),
		rs: make([]float64, p), z: make([]float64, p), chol: make([]float64, p*p),
		P: make([]float64, n*n), Pn: make([]float64, n*n), acqM: make([]float64, n*n),
		pnext: make([]float64, n*n), tcl: make([]float64, n*n),
		cs: make([]float64, p*n), cp: make([]float64, p*n), kt: make([]float64, p*n),
		sfull: make([]float64, p*p), rr: make([]float64, p*p), h: make([]float64, p),
		full: FullPattern(p),
	}
	if p0 != nil {
		f.p0 = make([]float64, n*n)
	}
	f.Reset(x0, p0)
	if p0 == nil && pr.form == Kalman {
		f.p0 = make([]float64, n*n)
		copy(f.p0, f.P)
	}
	return f
}

// Reset restarts the filter at the absolute state x0 (nil means X0), as
// NewFilter does: the next Step does not predict, and the covariance
// restarts from p0 (nil: as in NewFilter). It panics if x0 or p0 has the
// wrong dimension.
func (f *Filter) Reset(x0 []float64, p0 mat.Symmetric) {
	n := f.n
	if x0 != nil && len(x0) != n {
		panic(fmt.Sprintf("estimator: filter x0 has %d entries, want %d", len(x0), n))
	}
	if p0 != nil {
		if d := p0.SymmetricDim(); d != n {
			panic(fmt.Sprintf("estimator: filter p0 is %d×%d, want %d×%d", d, d, n, n))
		}
		if f.p0 == nil {
			f.p0 = make([]float64, n*n)
		}
		for i := 0; i < n; i++ {
			for j := 0; j < n; j++ {
				f.p0[i*n+j] = p0.At(i, j)
			}
		}
	}
	for i := range f.x {
		f.x[i] = 0
		if x0 != nil {
			f.x[i] = x0[i] - f.pr.x0[i]
		}
	}
	clear(f.pend)
	clear(f.uPrev)
	clear(f.du)
	f.hasP = false
	f.first = true
	f.rejected = 0
	f.used = 0
	f.svOK, f.svGain = false, nil
	f.acq, f.settled, f.hasNext = false, false, false
	flatMulVec(f.yhat, f.pr.c, f.x)
	switch {
	case f.pr.tracked && p0 == nil:
		copy(f.P, f.pr.setPub)
		f.settled = true
	case p0 != nil:
		copy(f.P, f.p0)
		f.acq = f.pr.tracked && f.pr.pss != nil
	case f.pr.form == Kalman:
		f.pr.defaultP(f.P, nil)
	}
}

// Use switches the filter to another prepared gain set for the same model,
// between ticks. The state carries over unchanged, and so does a prediction-
// form correction not yet applied (it enters the next prediction whatever
// the new form). Between sets that propagate a covariance (Kalman, tracked
// fixed gains) the covariance carries over and is propagated from there (a
// settled filter starts again from its steady state); a switch from a fixed
// gain set that does not to one that does starts the covariance from the new
// set's steady-state a priori P when known, else from the filter's initial
// covariance (p0 of NewFilter or Reset), else 10·Q.
//
// It panics if pr was prepared for a different model. It allocates nothing.
func (f *Filter) Use(pr *Prepared) {
	if !f.pr.sameModel(pr) {
		panic("estimator: Filter.Use: the gain set was prepared for a different model")
	}
	wasTracking := f.tracks()
	if f.settled && !f.first {
		// The a priori P of the next tick is the old set's steady state.
		copy(f.pnext, f.pr.setPrior)
		f.hasNext = true
	}
	f.settled = false
	f.pr = pr
	switch {
	case !f.tracks():
		f.acq, f.hasNext = false, false
	case !wasTracking:
		pr.defaultP(f.P, f.p0)
		f.acq, f.hasNext = false, false
	}
	if pr.form == Kalman || pr.pss == nil {
		f.acq = false
	}
	f.svOK, f.svGain = false, nil
}

// Prepared returns the gain set the filter runs with.
func (f *Filter) Prepared() *Prepared { return f.pr }

// Acquiring reports whether a tracked fixed gain set is still running the
// time-varying Kalman correction of its acquisition (see Filter).
func (f *Filter) Acquiring() bool { return f.acq }

// Finite reports whether the state, the correction pending for the next
// prediction and the covariance are all finite numbers. A filter for which
// it is false has diverged: its read-outs mean nothing until Reset.
func (f *Filter) Finite() bool {
	for i, v := range f.x {
		if v-v != 0 || f.pend[i]-f.pend[i] != 0 {
			return false
		}
	}
	if f.tracks() {
		for _, v := range f.P {
			if v-v != 0 {
				return false
			}
		}
	}
	return true
}

// Step runs one tick with the input u(k) and the outputs y(k)
// in absolute units, of lengths m and p. Only the outputs in present are
// read; the others may hold anything, NaN included. A present output whose
// value is NaN or infinite is treated as absent.
//
// In deviation variables, with x̂ the estimate after the previous Step:
//
//  1. Predict (not on the first Step after NewFilter or Reset):
//     x̂(k|k−1) = A·x̂ + B·(u(k−1) − U0), plus L·r(k−1) in the prediction
//     form; the covariance P⁻ = A·P·Aᵀ + Q (Kalman, acquiring, current
//     form), or the one the prediction-form recursion computed last tick.
//  2. Innovation on the present outputs s: r = (y − Y0) − C·x̂(k|k−1) −
//     D·(u(k) − U0), S_s = C_s·P⁻·C_sᵀ + R_s (without a covariance, the
//     fixed gain's stored S for that pattern), NIS = rᵀS_s⁻¹r.
//  3. Gate: while NIS exceeds χ²_k(gate), k the outputs left, drop the
//     output with the largest r_i²/S_ii and recompute NIS for the rest.
//     After GateRelease ticks on which the gate rejected every present
//     output, the next tick inflates the covariance (P⁻ + P0, or 10·P⁻
//     without P0), starts an acquisition for a tracked fixed gain set, and
//     corrects without the gate (Outcome.GateReleased).
//  4. Correct: Current x̂(k|k) = x̂(k|k−1) + L·r; Prediction keeps
//     x̂(k|k−1) as its estimate and L·r for the next prediction; a fixed gain
//     is used only if the set has one for exactly the outputs left, else the
//     tick only predicts (Outcome.NoGain). Kalman (and acquiring):
//     K = P⁻C_sᵀS_s⁻¹, x̂ = x̂(k|k−1) + K·r and the Joseph form
//     P = (I − KC_s)P⁻(I − KC_s)ᵀ + K·R_s·Kᵀ, symmetrised. The covariance of
//     a tracked fixed gain follows the recursion of its gain (see Filter).
//
// It panics if u or y has the wrong length.
func (f *Filter) Step(u, y []float64, present Pattern) Outcome {
	if len(u) != f.m || len(y) != f.p {
		panic(fmt.Sprintf("estimator: Filter.Step: u has %d entries and y %d, want %d and %d", len(u), len(y), f.m, f.p))
	}
	pr := f.pr
	du := f.du
	for j := range du {
		du[j] = u[j] - pr.u0[j]
	}

	// 1. Predict into xm, then swap: x holds x̂(k|k−1) from here on and is
	// corrected in place.
	if !f.first {
		flatMulVec2(f.xm, pr.a, f.x, pr.b, f.uPrev)
		if f.hasP {
			flatAdd(f.xm, f.pend)
		}
		f.x, f.xm = f.xm, f.x
		if f.tracks() && !f.settled {
			if f.hasNext {
				copy(f.P, f.pnext)
			} else {
				f.predictCov()
			}
		}
	}
	f.first = false
	f.hasP, f.hasNext = false, false
	if f.acq && (covNear(f.P, pr.pss, f.n, acquireTol) || (pr.setPrior != nil && psdBelow(f.P, pr.setPrior, f.n, 1+acquireTol, f.acqM))) {
		f.acq = false
	}

	// 2. Innovation of the present, finite outputs.
	flatMulVec2(f.yhat, pr.c, f.x, pr.d, du)
	pat := present & f.full
	for s := pat; s != 0; s &= s - 1 {
		i := bits.TrailingZeros64(uint64(s))
		v := y[i]
		if v-v != 0 { // NaN or ±Inf
			pat &^= 1 << uint(i)
			continue
		}
		f.r[i] = v - pr.y0[i] - f.yhat[i]
	}

	// 3 and 4.
	var out Outcome
	f.thr = pr.thr
	if f.thr != nil && f.rejected >= GateRelease {
		f.thr, out.GateReleased = nil, true
		f.release()
	}
	f.svOK, f.svGain = false, nil
	if g := &pr.gains; (f.settled || !f.tracks()) && pat == f.full && len(*g) > 0 && (*g)[0].chol != nil && f.correctSteady(pat, &out) {
		// The settled steady tick: every output present and accepted.
	} else {
		if f.settled {
			// Leave the steady state: from here the covariance is propagated.
			copy(f.P, pr.setPrior)
			f.settled = false
		}
		switch {
		case pr.form == Kalman || f.acq:
			f.correctKalman(pat, &out)
		case pr.tracked:
			f.correctTracked(pat, &out)
		default:
			f.correctFixed(pat, &out)
		}
	}
	if !f.acq && pr.tracked && !f.settled && out.Used == f.full && out.Outliers == 0 && out.Corrected &&
		covNear(f.P, pr.setPub, f.n, settleTol) && (pr.form == Current || covNear(f.pnext, pr.setPrior, f.n, settleTol)) {
		copy(f.P, pr.setPub)
		f.settled, f.hasNext = true, false
	}
	f.used = out.Used
	if out.Outliers != 0 && !out.Corrected {
		f.rejected++
	} else {
		f.rejected = 0
	}
	out.Refusing = f.rejected >= GateSuspect
	f.uPrev, f.du = f.du, f.uPrev
	return out
}

// correctSteady is the steady tick of a settled fixed gain set, or of a
// fixed gain set without covariance, with every output present: S is the
// one of the full-pattern gain. It reports false, having changed nothing,
// when the gate refuses the innovation, for the general way to judge it.
func (f *Filter) correctSteady(pat Pattern, out *Outcome) bool {
	pr := f.pr
	g := &pr.gains[0]
	k := len(g.idx)
	rs := f.r[:k]
	nis := 0.0
	z, ch, inv := f.z[:k], g.chol, g.invDiag[:k]
	for i, v := range rs {
		for j, lv := range ch[i*k : i*k+i] {
			v -= lv * z[j]
		}
		v *= inv[i]
		z[i] = v
		nis += v * v
	}
	if f.thr != nil && nis > f.thr[k] {
		return false
	}
	out.HasNIS, out.NIS, out.Dof = true, nis, k
	out.GateNIS, out.GateDof = nis, k
	f.svGain = g
	if pr.form == Current {
		flatMulVecAdd(f.x, g.l, rs)
	} else {
		flatMulVec(f.pend, g.l, rs)
		f.hasP = true
	}
	out.Corrected, out.Used = true, pat
	return true
}

// release inflates the covariance when the gate has refused every output
// for GateRelease ticks: the estimate is further from the truth than the
// filter believed, so the covariance grows by the initial covariance (the
// uncertainty of a start; ten times itself without one), and a tracked
// fixed gain set acquires again with the Kalman correction.
func (f *Filter) release() {
	if !f.tracks() {
		return
	}
	if f.settled {
		copy(f.P, f.pr.setPrior)
		f.settled = false
	}
	if f.p0 != nil {
		flatAdd(f.P, f.p0)
	} else {
		flatScale(f.P, 10)
	}
	f.acq = f.pr.tracked && f.pr.pss != nil
}

// covNear reports whether p is within tol of the steady state ss (both
// n×n): |p_ij − ss_ij| ≤ tol·√(ss_ii·ss_jj).
func covNear(p, ss []float64, n int, tol float64) bool {
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			tol := tol * math.Sqrt(math.Abs(ss[i*n+i]*ss[j*n+j]))
			if !(math.Abs(p[i*n+j]-ss[i*n+j]) <= tol) {
				return false
			}
		}
	}
	return true
}

// psdBelow reports whether p ⪯ c·ss in the positive semidefinite order, that
// is whether c·ss − p has no negative eigenvalue, by a Cholesky factorisation
// of c·ss − p in the scratch m (n×n). A pivot within a rounding margin of
// zero counts as zero (semidefinite), so p = ss with c = 1 passes. It
// allocates nothing.
func psdBelow(p, ss []float64, n int, c float64, m []float64) bool {
	for i := 0; i < n*n; i++ {
		m[i] = c*ss[i] - p[i]
	}
	for j := 0; j < n; j++ {
		scale := c * math.Abs(ss[j*n+j])
		d := m[j*n+j]
		for k := 0; k < j; k++ {
			d -= m[j*n+k] * m[j*n+k]
		}
		if !(d >= -1e-12*scale) { // negative, or NaN
			return false
		}
		if d <= 1e-12*scale {
			// A zero pivot: the rest of column j must vanish too.
			for i := j + 1; i < n; i++ {
				e := m[i*n+j]
				for k := 0; k < j; k++ {
					e -= m[i*n+k] * m[j*n+k]
				}
				if math.Abs(e) > 1e-9*math.Sqrt(scale*c*math.Abs(ss[i*n+i])) {
					return false
				}
				m[i*n+j] = 0
			}
			m[j*n+j] = 0
			continue
		}
		d = math.Sqrt(d)
		m[j*n+j] = d
		for i := j + 1; i < n; i++ {
			e := m[i*n+j]
			for k := 0; k < j; k++ {
				e -= m[i*n+k] * m[j*n+k]
			}
			m[i*n+j] = e / d
		}
	}
	return true
}

// correctFixed gates and corrects with the fixed gains.
func (f *Filter) correctFixed(pat Pattern, out *Outcome) {
	pr := f.pr
	for pat != 0 {
		g := pr.lookup(pat)
		if g == nil {
			out.NoGain = true
			break
		}
		k := len(g.idx)
		rs := f.rs[:k]
		for l, i := range g.idx {
			rs[l] = f.r[i]
		}
		if g.chol != nil {
			// NIS = |z|² with L·z = r, L the Cholesky factor of S.
			nis := 0.0
			z, ch, inv := f.z[:k], g.chol, g.invDiag[:k]
			for i, v := range rs {
				for j, lv := range ch[i*k : i*k+i] {
					v -= lv * z[j]
				}
				v *= inv[i]
				z[i] = v
				nis += v * v
			}
			if out.GateDof == 0 {
				out.GateNIS, out.GateDof = nis, k
			}
			if f.thr != nil && nis > f.thr[k] {
				out.GateNIS = math.Min(out.GateNIS, f.thr[out.GateDof])
				worst, wv := 0, -1.0
				for l, v := range rs {
					if e := v * v / g.sDiag[l]; e > wv {
						worst, wv = l, e
					}
				}
				bit := Pattern(1) << uint(g.idx[worst])
				out.Outliers |= bit
				pat &^= bit
				continue
			}
			out.HasNIS, out.NIS, out.Dof = true, nis, k
			f.svGain = g
		}
		if pr.form == Current {
			flatMulVecAdd(f.x, g.l, rs)
		} else {
			flatMulVec(f.pend, g.l, rs)
			f.hasP = true
		}
		out.Corrected = true
		break
	}
	out.Used = pat
}

// StateTo writes the published estimate, in absolute units (X0 + x̂), to
// dst. It panics if dst does not have n entries.
func (f *Filter) StateTo(dst []float64) {
	f.check("StateTo", len(dst), f.n)
	for i, v := range f.x {
		dst[i] = f.pr.x0[i] + v
	}
}

// StdTo writes the standard deviation of each state's estimate, the square
// roots of the diagonal of the covariance, to dst and reports whether it is
// known. The Kalman form and a tracked fixed gain set use the covariance of
// the filter as it runs (see Filter). Other fixed gains use the steady-state
// P stored with the gain for all outputs, whatever the outputs of the last
// tick (it is what the filter settles to with every output present);
// without one, StdTo fills dst with NaN and returns false.
func (f *Filter) StdTo(dst []float64) bool {
	f.check("StdTo", len(dst), f.n)
	n := f.n
	switch {
	case f.tracks():
		for i := range dst {
			dst[i] = math.Sqrt(math.Max(f.P[i*n+i], 0))
		}
		return true
	case f.pr.std != nil:
		copy(dst, f.pr.std)
		return true
	}
	for i := range dst {
		dst[i] = math.NaN()
	}
	return false
}

// CovarianceTo writes the covariance StdTo reports on into dst and reports
// whether it is known (when not, dst is left unchanged). An empty dst is
// resized to n×n; otherwise it panics if dst is not n×n.
func (f *Filter) CovarianceTo(dst *mat.SymDense) bool {
	n := f.n
	var src []float64
	switch {
	case f.tracks():
		src = f.P
	case f.pr.pFull != nil:
		src = f.pr.pFull
	default:
		return false
	}
	if dst.IsEmpty() {
		dst.ReuseAsSym(n)
	}
	f.check("CovarianceTo", dst.SymmetricDim(), n)
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			dst.SetSym(i, j, src[i*n+j])
		}
	}
	return true
}

// InnovationTo writes the innovation of the last tick to dst (length p):
// r_i = y_i − ŷ_i for the outputs in Outcome.Used, NaN for the others
// (absent, rejected by the gate, or no tick yet).
func (f *Filter) InnovationTo(dst []float64) {
	f.check("InnovationTo", len(dst), f.p)
	for i := range dst {
		if f.used.Has(i) {
			dst[i] = f.r[i]
		} else {
			dst[i] = math.NaN()
		}
	}
}

// InnovationVarTo writes the variance S_ii of each innovation of the last
// tick to dst (length p): for the outputs in Outcome.Used when S was known,
// NaN otherwise.
func (f *Filter) InnovationVarTo(dst []float64) {
	f.check("InnovationVarTo", len(dst), f.p)
	for i := range dst {
		dst[i] = math.NaN()
	}
	switch {
	case f.svGain != nil:
		for l, i := range f.svGain.idx {
			dst[i] = f.svGain.sDiag[l]
		}
	case f.svOK:
		for i := range dst {
			if f.used.Has(i) {
				dst[i] = f.sv[i]
			}
		}
	}
}

// PredictedOutputTo writes the output predicted for the last tick, in
// absolute units, to dst (length p): ŷ = Y0 + C·x̂(k|k−1) + D·(u(k) − U0),
// for every output, present or not.
func (f *Filter) PredictedOutputTo(dst []float64) {
	f.check("PredictedOutputTo", len(dst), f.p)
	for i, v := range f.yhat {
		dst[i] = f.pr.y0[i] + v
	}
}

func (f *Filter) check(what string, got, want int) {
	if got != want {
		panic(fmt.Sprintf("estimator: Filter.%s: %d entries, want %d", what, got, want))
	}
}
