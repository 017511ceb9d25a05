package estimator

import (
	"fmt"
	"math"
	"math/bits"
	"slices"

	"gonum.org/v1/gonum/mat"
)

// Prepared is a gain set checked against one model and compiled into the
// flat, row-major slices the per-tick Step works on. It is immutable and
// may be shared by any number of filters (a shadow filter, a replay).
//
// Build one with Prepare; swap it into a running filter with Filter.Use.
type Prepared struct {
	model *Model
	set   *GainSet
	form  Form

	n, m, p    int
	a, b, c, d []float64 // row-major copies of the model
	x0, u0, y0 []float64 // operating point, zeros when the model has none

	gate float64   // outlier-gate probability, 0 when the gate is off
	thr  []float64 // thr[k] = χ²_k(gate), k = 1..p; nil when the gate is off

	// Fixed gains (Prediction, Current).
	gains     []compiledGain
	byPattern map[Pattern]int
	std       []float64 // √diag of the full pattern's P; nil when unknown
	pFull     []float64 // the full pattern's P, n×n; nil when unknown

	// Kalman.
	q, r []float64 // n×n, p×p
	pss  []float64 // steady-state a priori P, n×n; nil when unknown
}

// compiledGain is one PatternGain in flat form.
type compiledGain struct {
	outputs Pattern
	idx     []int     // the outputs, ascending
	l       []float64 // n×k, row-major
	chol    []float64 // lower Cholesky factor of S, k×k row-major; nil when S is unknown
	invDiag []float64 // 1/chol[i,i]
	sDiag   []float64 // diag(S)
}

// Prepare checks the gain set g against the model and compiles it.
//
// gate is the probability of the outlier gate (0.999 rejects an innovation
// whose NIS a consistent filter exceeds one tick in a thousand); 0 turns the
// gate off. The gate needs S, so it is also off for a fixed gain without S.
//
// It returns an error, never panics, on anything a gains file can get
// wrong: a form other than the three known, dimensions of L, S or P that do
// not match the model and the pattern, non-finite numbers, an empty or
// out-of-range or repeated pattern, a first gain that is not for all outputs,
// error dynamics not strictly inside the unit circle (the eigenvalues of
// A − L·C_s for the prediction form, A − L·C_s·A for the current form, C_s
// the rows of C in the pattern), an S that is not positive definite, a P
// with a negative diagonal entry. The Kalman form needs Q (n×n, positive
// semidefinite) and R (p×p, positive definite); where the set leaves them
// nil, the model's are used.
func Prepare(md *Model, g *GainSet, gate float64) (*Prepared, error) {
	if md == nil || g == nil {
		return nil, fmt.Errorf("prepare: model and gain set are required")
	}
	if err := md.Validate(); err != nil {
		return nil, fmt.Errorf("prepare gain set %q: %w", g.Name, err)
	}
	if !(gate >= 0 && gate < 1) {
		return nil, fmt.Errorf("prepare gain set %q: gate probability %v, want 0 (off) or in (0, 1)", g.Name, gate)
	}
	n, m, p := md.Dims()
	pr := &Prepared{
		model: md, set: g, form: g.Form,
		n: n, m: m, p: p,
		a: denseFlat(md.A), b: denseFlat(md.B), c: denseFlat(md.C), d: denseFlat(md.D),
		x0: pointOrZeros(md.X0, n), u0: pointOrZeros(md.U0, m), y0: pointOrZeros(md.Y0, p),
		gate: gate,
	}
	if gate > 0 {
		pr.thr = make([]float64, p+1)
		for k := 1; k <= p; k++ {
			pr.thr[k] = ChiSquareQuantile(k, gate)
		}
	}
	var err error
	switch g.Form {
	case Prediction, Current:
		err = pr.compileFixed(md, g)
	case Kalman:
		err = pr.compileKalman(md, g)
	default:
		err = fmt.Errorf("form %d is not one of prediction, current, kalman", int(g.Form))
	}
	if err != nil {
		return nil, fmt.Errorf("prepare gain set %q: %w", g.Name, err)
	}
	return pr, nil
}

func (pr *Prepared) compileFixed(md *Model, g *GainSet) error {
	n, p := pr.n, pr.p
	if len(g.Gains) == 0 {
		return fmt.Errorf("%s form without gains", g.Form)
	}
	full := FullPattern(p)
	pr.byPattern = make(map[Pattern]int, len(g.Gains))
	for gi, pg := range g.Gains {
		where := fmt.Sprintf("gain %d (outputs %b)", gi, uint64(pg.Outputs))
		if pg.Outputs == 0 || pg.Outputs&^full != 0 {
			return fmt.Errorf("%s: pattern is empty or names outputs beyond the model's %d", where, p)
		}
		if gi == 0 && pg.Outputs != full {
			return fmt.Errorf("%s: the first gain must be for all %d outputs", where, p)
		}
		if _, dup := pr.byPattern[pg.Outputs]; dup {
			return fmt.Errorf("%s: pattern given twice", where)
		}
		k := pg.Outputs.Len()
		if pg.L == nil {
			return fmt.Errorf("%s: L is missing", where)
		}
		if r, c := pg.L.Dims(); r != n || c != k {
			return fmt.Errorf("%s: L is %d×%d, want %d×%d", where, r, c, n, k)
		}
		if err := finite("L", pg.L); err != nil {
			return fmt.Errorf("%s: %w", where, err)
		}
		cg := compiledGain{outputs: pg.Outputs, idx: pg.Outputs.Indices(nil), l: denseFlat(pg.L)}
		if err := checkErrorDynamics(md, pg.L, cg.idx, g.Form); err != nil {
			return fmt.Errorf("%s: %w", where, err)
		}
		if pg.S != nil {
			if r := pg.S.SymmetricDim(); r != k {
				return fmt.Errorf("%s: S is %d×%d, want %d×%d", where, r, r, k, k)
			}
			if err := finite("S", pg.S); err != nil {
				return fmt.Errorf("%s: %w", where, err)
			}
			cg.chol = denseFlat(pg.S)
			cg.sDiag = make([]float64, k)
			for i := range cg.sDiag {
				cg.sDiag[i] = pg.S.At(i, i)
			}
			if !flatCholesky(cg.chol, k) {
				return fmt.Errorf("%s: S is not positive definite", where)
			}
			cg.invDiag = make([]float64, k)
			for i := range cg.invDiag {
				cg.invDiag[i] = 1 / cg.chol[i*k+i]
			}
		}
		if pg.P != nil {
			if r := pg.P.SymmetricDim(); r != n {
				return fmt.Errorf("%s: P is %d×%d, want %d×%d", where, r, r, n, n)
			}
			if err := finite("P", pg.P); err != nil {
				return fmt.Errorf("%s: %w", where, err)
			}
			for i := 0; i < n; i++ {
				if pg.P.At(i, i) < 0 {
					return fmt.Errorf("%s: P[%d,%d] = %v is negative", where, i, i, pg.P.At(i, i))
				}
			}
			if gi == 0 {
				pr.pFull = denseFlat(pg.P)
				pr.std = make([]float64, n)
				for i := range pr.std {
					pr.std[i] = math.Sqrt(pg.P.At(i, i))
				}
			}
		}
		pr.byPattern[pg.Outputs] = len(pr.gains)
		pr.gains = append(pr.gains, cg)
	}
	return nil
}

// checkErrorDynamics returns an error unless the error dynamics of the
// fixed gain l for the outputs idx are strictly inside the unit circle.
func checkErrorDynamics(md *Model, l *mat.Dense, idx []int, form Form) error {
	n, _ := md.A.Dims()
	cs := mat.NewDense(len(idx), n, nil)
	for r, i := range idx {
		cs.SetRow(r, mat.Row(nil, i, md.C))
	}
	var lc, acl mat.Dense
	lc.Mul(l, cs)
	if form == Current {
		var lca mat.Dense
		lca.Mul(&lc, md.A)
		lc = lca
	}
	acl.Sub(md.A, &lc)
	var eig mat.Eigen
	if !eig.Factorize(&acl, mat.EigenNone) {
		return fmt.Errorf("eigenvalues of the error dynamics did not converge")
	}
	for _, v := range eig.Values(nil) {
		if mag := math.Hypot(real(v), imag(v)); !(mag < 1) {
			return fmt.Errorf("error dynamics have an eigenvalue %.6g of magnitude %.6g, want all inside the unit circle", v, mag)
		}
	}
	return nil
}

func (pr *Prepared) compileKalman(md *Model, g *GainSet) error {
	n, p := pr.n, pr.p
	if len(g.Gains) != 0 {
		return fmt.Errorf("kalman form takes Q and R, not fixed gains")
	}
	q, r := g.Q, g.R
	if q == nil {
		q = md.Q
	}
	if r == nil {
		r = md.R
	}
	if q == nil || r == nil {
		return fmt.Errorf("kalman form needs Q and R, in the gain set or the model")
	}
	if d := q.SymmetricDim(); d != n {
		return fmt.Errorf("Q is %d×%d, want %d×%d", d, d, n, n)
	}
	if d := r.SymmetricDim(); d != p {
		return fmt.Errorf("R is %d×%d, want %d×%d", d, d, p, p)
	}
	if err := finite("Q", q); err != nil {
		return err
	}
	if err := finite("R", r); err != nil {
		return err
	}
	var es mat.EigenSym
	if !es.Factorize(q, false) {
		return fmt.Errorf("eigenvalues of Q did not converge")
	}
	vals := es.Values(nil)
	if lo, hi := slices.Min(vals), slices.Max(vals); lo < -1e-12*math.Max(hi, 0) {
		return fmt.Errorf("Q has eigenvalue %g, want positive semidefinite", lo)
	}
	pr.q, pr.r = denseFlat(q), denseFlat(r)
	if !flatCholesky(denseFlat(r), p) {
		return fmt.Errorf("R is not positive definite")
	}
	pr.pss = steadyStatePrior(md, q, r)
	return nil
}

// steadyStatePrior returns the steady-state a priori error covariance of
// the Kalman filter for (A, C, Q, R) (SteadyStateKalman), row-major, or nil
// when there is none: (A, C) not detectable, or a mode on the unit circle
// that Q does not excite.
func steadyStatePrior(md *Model, q, r *mat.SymDense) []float64 {
	kg, err := SteadyStateKalman(md.A, md.C, q, r)
	if err != nil {
		return nil
	}
	return denseFlat(kg.P)
}

// Model returns the model the gain set was prepared for.
func (pr *Prepared) Model() *Model { return pr.model }

// Set returns the gain set this was prepared from.
func (pr *Prepared) Set() *GainSet { return pr.set }

// Form returns the form of the gain set.
func (pr *Prepared) Form() Form { return pr.form }

// Gate returns the outlier-gate probability, 0 when the gate is off.
func (pr *Prepared) Gate() float64 { return pr.gate }

// lookup returns the fixed gain for exactly the pattern s, or nil.
func (pr *Prepared) lookup(s Pattern) *compiledGain {
	if len(pr.gains) > 0 && pr.gains[0].outputs == s {
		return &pr.gains[0]
	}
	if i, ok := pr.byPattern[s]; ok {
		return &pr.gains[i]
	}
	return nil
}

// sameModel reports whether pr and o were prepared for the same model:
// the same pointer, or equal dimensions, matrices and operating point.
func (pr *Prepared) sameModel(o *Prepared) bool {
	if pr.model == o.model {
		return true
	}
	return pr.n == o.n && pr.m == o.m && pr.p == o.p &&
		slices.Equal(pr.a, o.a) && slices.Equal(pr.b, o.b) &&
		slices.Equal(pr.c, o.c) && slices.Equal(pr.d, o.d) &&
		slices.Equal(pr.x0, o.x0) && slices.Equal(pr.u0, o.u0) && slices.Equal(pr.y0, o.y0)
}

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
}

// GateRelease is the number of consecutive ticks on which the outlier gate
// rejects every present output before the next tick corrects without the
// gate. A gate protects a converged estimate from a bad sample; once the
// estimate itself is far off (a start far from the truth, a plant step the
// model did not foresee) every sample looks like an outlier, and a gate that
// never relents would leave the filter coasting for good. Releasing it after
// a short run of total rejections is common practice in tracking.
const GateRelease = 10

// Filter runs one estimator, tick by tick. Build it with NewFilter; it
// allocates all its buffers there, and Step, the read-outs, Use and Reset
// allocate nothing. A Filter is not safe for concurrent use.
//
// The published estimate after a Step is x̂(k|k) for the current and Kalman
// forms and x̂(k|k−1) for the prediction form, whose correction with y(k)
// enters the prediction of the next tick.
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

	yhat   []float64 // C·x̂(k|k−1) + D·(u(k) − U0)
	r      []float64 // innovation per output; valid for the outputs in used
	sv     []float64 // S_ii per output; valid for the outputs in used when svOK
	used   Pattern
	svOK   bool          // Kalman: sv holds S_ii for the outputs in used
	svGain *compiledGain // fixed gains: the gain whose S was used, or nil
	full   Pattern       // all p outputs

	// scratch, sized for all p outputs
	idx  []int
	act  []int
	rs   []float64 // innovation of the active outputs
	z    []float64 // whitened innovation
	chol []float64 // p×p

	// Kalman
	P, Pn []float64 // n×n: the covariance, and scratch
	p0    []float64 // the initial covariance; nil when none was given or derived
	cs    []float64 // p×n: the rows of C for the present outputs
	cp    []float64 // p×n: C_s·P⁻
	kt    []float64 // p×n: Kᵀ for the outputs used
	sfull []float64 // p×p: C_s·P⁻·C_sᵀ + R_s for the present outputs
	rr    []float64 // p×p: R for the outputs used
	h     []float64 // p: a row of K·R_s − M·C_sᵀ
}

// NewFilter returns a filter for the prepared gain set pr starting at the
// absolute state x0 (nil means the operating point X0), taken as the
// estimate x̂(0|−1): the first Step does not predict.
//
// p0 is the initial covariance of the Kalman form. When it is nil the
// filter starts from the steady-state a priori covariance of the set
// (SteadyStateKalman with all outputs) when there is one, else from 10·Q.
// Fixed gains ignore p0 except to keep it for a later switch to a Kalman set
// (see Use). It panics if x0 or p0 has the wrong dimension.
func NewFilter(pr *Prepared, x0 []float64, p0 mat.Symmetric) *Filter {
	n, m, p := pr.n, pr.m, pr.p
	f := &Filter{
		pr: pr, n: n, m: m, p: p,
		x: make([]float64, n), xm: make([]float64, n), pend: make([]float64, n),
		uPrev: make([]float64, m), du: make([]float64, m),
		yhat: make([]float64, p), r: make([]float64, p), sv: make([]float64, p),
		idx: make([]int, p), act: make([]int, p),
		rs: make([]float64, p), z: make([]float64, p), chol: make([]float64, p*p),
		P: make([]float64, n*n), Pn: make([]float64, n*n),
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
// NewFilter does: the next Step does not predict, and the Kalman covariance
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
	flatMulVec(f.yhat, f.pr.c, f.x)
	switch {
	case p0 != nil:
		copy(f.P, f.p0)
	case f.pr.form == Kalman:
		f.pr.defaultP(f.P, nil)
	}
}

// defaultP writes the covariance a Kalman filter on pr starts from when
// none is given: the steady-state a priori P when known, else fallback
// when it is not nil, else 10·Q.
func (pr *Prepared) defaultP(dst, fallback []float64) {
	switch {
	case pr.pss != nil:
		copy(dst, pr.pss)
	case fallback != nil:
		copy(dst, fallback)
	default:
		for i, v := range pr.q {
			dst[i] = 10 * v
		}
	}
}

// Use switches the filter to another prepared gain set for the same model,
// between ticks. The state carries over unchanged, and so does a prediction-
// form correction not yet applied (it enters the next prediction whatever
// the new form). Kalman to Kalman keeps the covariance; a switch from fixed
// gains to Kalman starts the covariance from the new set's steady-state a
// priori P when known, else from the filter's initial covariance (p0 of
// NewFilter or Reset), else 10·Q.
//
// It panics if pr was prepared for a different model. It allocates nothing.
func (f *Filter) Use(pr *Prepared) {
	if !f.pr.sameModel(pr) {
		panic("estimator: Filter.Use: the gain set was prepared for a different model")
	}
	old := f.pr.form
	f.pr = pr
	if pr.form == Kalman && old != Kalman {
		pr.defaultP(f.P, f.p0)
	}
	f.svOK, f.svGain = false, nil
}

// Prepared returns the gain set the filter runs with.
func (f *Filter) Prepared() *Prepared { return f.pr }

// Step runs one tick with the input u(k) and the outputs y(k)
// in absolute units, of lengths m and p. Only the outputs in present are
// read; the others may hold anything, NaN included. A present output whose
// value is NaN or infinite is treated as absent.
//
// In deviation variables, with x̂ the estimate after the previous Step:
//
//  1. Predict (not on the first Step after NewFilter or Reset):
//     x̂(k|k−1) = A·x̂ + B·(u(k−1) − U0), plus L·r(k−1) in the prediction
//     form; Kalman: P⁻ = A·P·Aᵀ + Q.
//  2. Innovation on the present outputs s: r = (y − Y0) − C·x̂(k|k−1) −
//     D·(u(k) − U0), S_s (the fixed gain's stored S for that pattern, or
//     C_s·P⁻·C_sᵀ + R_s), NIS = rᵀS_s⁻¹r.
//  3. Gate: while NIS exceeds χ²_k(gate), k the outputs left, drop the
//     output with the largest r_i²/S_ii and recompute NIS for the rest.
//     After GateRelease ticks on which the gate rejected every present
//     output, the next tick corrects without it (Outcome.GateReleased).
//  4. Correct: Current x̂(k|k) = x̂(k|k−1) + L·r; Prediction keeps
//     x̂(k|k−1) as its estimate and L·r for the next prediction; a fixed gain
//     is used only if the set has one for exactly the outputs left, else the
//     tick only predicts (Outcome.NoGain). Kalman: K = P⁻C_sᵀS_s⁻¹,
//     x̂ = x̂(k|k−1) + K·r and the Joseph form P = (I − KC_s)P⁻(I − KC_s)ᵀ +
//     K·R_s·Kᵀ, symmetrised.
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
		if pr.form == Kalman {
			f.predictCov()
		}
	}
	f.first = false
	f.hasP = false

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
	}
	f.svOK, f.svGain = false, nil
	if pr.form == Kalman {
		f.correctKalman(pat, &out)
	} else if g := &pr.gains[0]; pat == g.outputs && g.chol != nil {
		// The common case inline: every output present (so r is in the
		// order of the gain's outputs) and S known. An outlier goes the
		// general way.
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
			f.correctFixed(pat, &out)
		} else {
			out.HasNIS, out.NIS, out.Dof = true, nis, k
			f.svGain = g
			if pr.form == Current {
				flatMulVecAdd(f.x, g.l, rs)
			} else {
				flatMulVec(f.pend, g.l, rs)
				f.hasP = true
			}
			out.Corrected, out.Used = true, pat
		}
	} else {
		f.correctFixed(pat, &out)
	}
	f.used = out.Used
	if out.Outliers != 0 && !out.Corrected {
		f.rejected++
	} else {
		f.rejected = 0
	}
	f.uPrev, f.du = f.du, f.uPrev
	return out
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
			if f.thr != nil && nis > f.thr[k] {
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

// predictCov sets P = A·P·Aᵀ + Q, using Pn for A·P. As P is symmetric,
// A·P = A·Pᵀ and both products are of the form X·Yᵀ (rows against rows).
func (f *Filter) predictCov() {
	n := f.n
	P, t, q := f.P, f.Pn, f.pr.q
	flatMulNT(t, f.pr.a, P, n, n, n, false)
	flatMulNT(P, t, f.pr.a, n, n, n, true)
	for i := 0; i < n; i++ {
		P[i*n+i] += q[i*n+i]
		for j := i + 1; j < n; j++ {
			v := P[i*n+j] + q[i*n+j]
			P[i*n+j] = v
			P[j*n+i] = v
		}
	}
}

// correctKalman gates and corrects with the time-varying Kalman gain.
func (f *Filter) correctKalman(pat Pattern, out *Outcome) {
	pr := f.pr
	n, p := f.n, f.p
	k := 0
	for s := pat; s != 0; s &= s - 1 {
		i := bits.TrailingZeros64(uint64(s))
		f.idx[k] = i
		copy(f.cs[k*n:k*n+n], pr.c[i*n:i*n+n])
		k++
	}
	if k == 0 {
		return
	}
	idx := f.idx[:k]
	// C_s·P⁻ (P symmetric, so rows of C_s against rows of P) and
	// S = C_s·P⁻·C_sᵀ + R_s, k×k.
	cs, cp, sf := f.cs[:k*n], f.cp[:k*n], f.sfull[:k*k]
	flatMulNT(cp, cs, f.P, k, n, n, false)
	flatMulNT(sf, cp, cs, k, k, n, false)
	for l, i := range idx {
		for mm := l; mm < k; mm++ {
			v := 0.5*(sf[l*k+mm]+sf[mm*k+l]) + pr.r[i*p+idx[mm]]
			sf[l*k+mm] = v
			sf[mm*k+l] = v
		}
	}
	act := f.act[:k]
	for l := range act {
		act[l] = l
	}
	var nis float64
	for {
		ka := len(act)
		if ka == 0 {
			out.Used = 0
			return
		}
		ch := f.chol[:ka*ka]
		for a, la := range act {
			for b, lb := range act[:a+1] {
				ch[a*ka+b] = sf[la*k+lb]
			}
		}
		if !flatCholesky(ch, ka) {
			// Not positive definite: only possible when rounding has
			// broken P; predict only.
			out.Used = 0
			return
		}
		rs := f.rs[:ka]
		for a, la := range act {
			rs[a] = f.r[idx[la]]
		}
		nis = flatForwardNorm(f.z[:ka], ch, nil, rs)
		if f.thr == nil || !(nis > f.thr[ka]) {
			break
		}
		worst, wv := 0, -1.0
		for a, la := range act {
			if e := rs[a] * rs[a] / sf[la*k+la]; e > wv {
				worst, wv = a, e
			}
		}
		out.Outliers |= Pattern(1) << uint(idx[act[worst]])
		act = append(act[:worst], act[worst+1:]...)
	}
	ka := len(act)
	var used Pattern
	for _, la := range act {
		used |= Pattern(1) << uint(idx[la])
		f.sv[idx[la]] = sf[la*k+la]
	}
	f.svOK = true
	out.Used, out.Corrected, out.HasNIS, out.NIS, out.Dof = used, true, true, nis, ka

	// Kᵀ = S⁻¹·C_s·P⁻: the active rows of C_s·P⁻, solved with the Cholesky
	// factor of S, forward and backward, row by row. The active rows of C_s
	// move to the top of cs (act is ascending, so row a comes from row
	// act[a] ≥ a), and R_s for them goes to rr.
	ch := f.chol[:ka*ka]
	kt := f.kt[:ka*n]
	rr := f.rr[:ka*ka]
	for a, la := range act {
		copy(kt[a*n:a*n+n], cp[la*n:la*n+n])
		if la != a {
			copy(cs[a*n:a*n+n], cs[la*n:la*n+n])
		}
		for b, lb := range act {
			rr[a*ka+b] = pr.r[idx[la]*p+idx[lb]]
		}
	}
	for a := 0; a < ka; a++ {
		row := kt[a*n : a*n+n]
		for b := 0; b < a; b++ {
			flatAxpy(row, -ch[a*ka+b], kt[b*n:b*n+n])
		}
		flatScale(row, 1/ch[a*ka+a])
	}
	for a := ka - 1; a >= 0; a-- {
		row := kt[a*n : a*n+n]
		for b := a + 1; b < ka; b++ {
			flatAxpy(row, -ch[b*ka+a], kt[b*n:b*n+n])
		}
		flatScale(row, 1/ch[a*ka+a])
	}
	// x̂ += K·r.
	rs := f.rs[:ka]
	for a := 0; a < ka; a++ {
		flatAxpy(f.x, rs[a], kt[a*n:a*n+n])
	}
	// Joseph form, a row i at a time into Pn:
	//   M_i = P⁻_i − Σ_a K_ia·(C_s·P⁻)_a                (M = (I − K·C_s)·P⁻)
	//   h_b = Σ_a K_ia·R_ab − M_i·C_sbᵀ                 (h = K·R_s − M·C_sᵀ)
	//   row i of M·(I − K·C_s)ᵀ + K·R_s·Kᵀ = M_i + Σ_a h_a·Kᵀ_a,
	// then symmetrised into P.
	P, M := f.P, f.Pn
	h := f.h[:ka]
	for i := 0; i < n; i++ {
		mi := M[i*n : i*n+n]
		copy(mi, P[i*n:i*n+n])
		for a, la := range act {
			flatAxpy(mi, -kt[a*n+i], cp[la*n:la*n+n])
		}
		for b := range h {
			v := 0.0
			for a := 0; a < ka; a++ {
				v += kt[a*n+i] * rr[a*ka+b]
			}
			h[b] = v - flatDot(mi, cs[b*n:b*n+n])
		}
		for a, v := range h {
			flatAxpy(mi, v, kt[a*n:a*n+n])
		}
	}
	for i := 0; i < n; i++ {
		P[i*n+i] = M[i*n+i]
		for j := i + 1; j < n; j++ {
			v := 0.5 * (M[i*n+j] + M[j*n+i])
			P[i*n+j] = v
			P[j*n+i] = v
		}
	}
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
// known. The Kalman form uses its current covariance. Fixed gains use the
// steady-state P stored with the gain for all outputs, whatever the outputs
// of the last tick (it is what the filter settles to with every output
// present); without one, StdTo fills dst with NaN and returns false.
func (f *Filter) StdTo(dst []float64) bool {
	f.check("StdTo", len(dst), f.n)
	n := f.n
	switch {
	case f.pr.form == Kalman:
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
	case f.pr.form == Kalman:
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

// flatCholesky factorises the symmetric positive definite k×k matrix in a
// (row-major, lower triangle read) in place into its lower Cholesky factor
// and reports whether it is positive definite. The upper triangle is left
// as it was.
func flatCholesky(a []float64, k int) bool {
	for j := 0; j < k; j++ {
		rj := a[j*k : j*k+j]
		s := a[j*k+j] - flatDot(rj, rj)
		if !(s > 0) {
			return false
		}
		d := math.Sqrt(s)
		a[j*k+j] = d
		for i := j + 1; i < k; i++ {
			a[i*k+j] = (a[i*k+j] - flatDot(a[i*k:i*k+j], rj)) / d
		}
	}
	return true
}

// flatForwardNorm solves L·z = r for the lower factor l (k×k row-major,
// k = len(r)) and returns zᵀz = rᵀ(L·Lᵀ)⁻¹r. invDiag holds 1/L_ii, or is
// nil to divide.
func flatForwardNorm(z, l, invDiag, r []float64) float64 {
	k := len(r)
	z = z[:k]
	nis := 0.0
	for i := 0; i < k; i++ {
		v := r[i]
		for j, lv := range l[i*k : i*k+i] {
			v -= lv * z[j]
		}
		if invDiag != nil {
			v *= invDiag[i]
		} else {
			v /= l[i*k+i]
		}
		z[i] = v
		nis += v * v
	}
	return nis
}

// The kernels below are the per-tick arithmetic: plain loops over row-major
// slices. Dot products keep four partial sums so that the additions do not
// wait on each other (gcc -O2 may not do this for C, which must keep the
// order of a sum); the index arithmetic is written so that the compiler can
// drop the bounds checks in the inner loops.

// flatDot returns Σ a_i·b_i over len(a) entries.
func flatDot(a, b []float64) float64 {
	b = b[:len(a)]
	var s0, s1, s2, s3 float64
	i := 0
	for ; i < len(a)-3; i += 4 {
		s0 += a[i] * b[i]
		s1 += a[i+1] * b[i+1]
		s2 += a[i+2] * b[i+2]
		s3 += a[i+3] * b[i+3]
	}
	for ; i < len(a); i++ {
		s0 += a[i] * b[i]
	}
	return (s0 + s1) + (s2 + s3)
}

// flatMulVec sets dst = A·x for A row-major len(dst)×len(x).
func flatMulVec(dst, a, x []float64) {
	c := len(x)
	for r := range dst {
		row := a[r*c : r*c+c]
		row = row[:len(x)]
		var s0, s1, s2, s3 float64
		i := 0
		for ; i < len(x)-3; i += 4 {
			s0 += row[i] * x[i]
			s1 += row[i+1] * x[i+1]
			s2 += row[i+2] * x[i+2]
			s3 += row[i+3] * x[i+3]
		}
		for ; i < len(x); i++ {
			s0 += row[i] * x[i]
		}
		dst[r] = (s0 + s1) + (s2 + s3)
	}
}

// flatMulVec2 sets dst = A·x + B·u for A row-major len(dst)×len(x) and B
// row-major len(dst)×len(u).
func flatMulVec2(dst, a, x, b, u []float64) {
	c, cu := len(x), len(u)
	for r := range dst {
		row := a[r*c : r*c+c]
		row = row[:len(x)]
		var s0, s1, s2, s3 float64
		i := 0
		for ; i < len(x)-3; i += 4 {
			s0 += row[i] * x[i]
			s1 += row[i+1] * x[i+1]
			s2 += row[i+2] * x[i+2]
			s3 += row[i+3] * x[i+3]
		}
		for ; i < len(x); i++ {
			s0 += row[i] * x[i]
		}
		brow := b[r*cu : r*cu+cu]
		brow = brow[:len(u)]
		for j, v := range brow {
			s1 += v * u[j]
		}
		dst[r] = (s0 + s1) + (s2 + s3)
	}
}

// flatMulVecAdd adds A·x to dst for A row-major len(dst)×len(x).
func flatMulVecAdd(dst, a, x []float64) {
	c := len(x)
	for r := range dst {
		row := a[r*c : r*c+c]
		row = row[:len(x)]
		var s0, s1, s2, s3 float64
		i := 0
		for ; i < len(x)-3; i += 4 {
			s0 += row[i] * x[i]
			s1 += row[i+1] * x[i+1]
			s2 += row[i+2] * x[i+2]
			s3 += row[i+3] * x[i+3]
		}
		for ; i < len(x); i++ {
			s0 += row[i] * x[i]
		}
		dst[r] += (s0 + s1) + (s2 + s3)
	}
}

// flatMulNT sets dst (ra×rb, row-major) to A·Bᵀ for A ra×k and B rb×k,
// both row-major: every entry is a row of A against a row of B. With upper
// set (ra == rb), only the entries on and above the diagonal are computed
// (and a few below it, in the diagonal blocks); the rest of dst is left as
// it was. It works in 2×2 blocks: four sums share each pair of loads.
func flatMulNT(dst, a, b []float64, ra, rb, k int, upper bool) {
	i := 0
	for ; i+1 < ra; i += 2 {
		a0 := a[i*k : i*k+k]
		a1 := a[(i+1)*k : (i+1)*k+k]
		a1 = a1[:len(a0)]
		d0 := dst[i*rb : i*rb+rb]
		d1 := dst[(i+1)*rb : (i+1)*rb+rb]
		j := 0
		if upper {
			j = i
		}
		for ; j+1 < rb; j += 2 {
			b0 := b[j*k : j*k+k]
			b1 := b[(j+1)*k : (j+1)*k+k]
			b0 = b0[:len(a0)]
			b1 = b1[:len(a0)]
			var s00, s01, s10, s11 float64
			for l, x0 := range a0 {
				x1 := a1[l]
				y0, y1 := b0[l], b1[l]
				s00 += x0 * y0
				s01 += x0 * y1
				s10 += x1 * y0
				s11 += x1 * y1
			}
			d0[j], d0[j+1] = s00, s01
			d1[j], d1[j+1] = s10, s11
		}
		if j < rb {
			bj := b[j*k : j*k+k]
			d0[j] = flatDot(a0, bj)
			d1[j] = flatDot(a1, bj)
		}
	}
	if i < ra {
		ai := a[i*k : i*k+k]
		j := 0
		if upper {
			j = i
		}
		for ; j < rb; j++ {
			dst[i*rb+j] = flatDot(ai, b[j*k:j*k+k])
		}
	}
}

// flatAxpy adds alpha·x to y over len(y) entries.
func flatAxpy(y []float64, alpha float64, x []float64) {
	x = x[:len(y)]
	for i := range y {
		y[i] += alpha * x[i]
	}
}

// flatAdd adds x to y.
func flatAdd(y, x []float64) {
	x = x[:len(y)]
	for i := range y {
		y[i] += x[i]
	}
}

// flatScale multiplies x by alpha.
func flatScale(x []float64, alpha float64) {
	for i := range x {
		x[i] *= alpha
	}
}
