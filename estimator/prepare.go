package estimator

import (
	"fmt"
	"math"
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

	// Kalman; for fixed gains set too when the model has Q and R.
	q, r []float64 // n×n, p×p
	pss  []float64 // steady-state a priori P of the Kalman filter, n×n; nil when unknown

	// Fixed gains with the model's noise (tracked): the filter propagates
	// its own covariance and settles on these.
	tracked  bool
	setPrior []float64 // steady-state a priori P of the full-pattern gain, n×n
	setPub   []float64 // steady-state covariance of the published estimate, n×n
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
		where := fmt.Sprintf("gain %d (outputs %s)", gi, patternLabel(md, pg.Outputs))
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
	if md.Q != nil && md.R != nil {
		return pr.compileTracked(md, g)
	}
	return nil
}

// compileTracked prepares a fixed gain set to carry its own covariance
// (Filter): with the model's Q and R, the steady state the full-pattern gain
// settles to (FixedGainCovariance) replaces the S and P stored with it —
// those were computed for the noise of the design, these for the noise of the
// model that runs — and the steady-state Kalman filter is kept for the
// acquisition from a start or a reset.
func (pr *Prepared) compileTracked(md *Model, g *GainSet) error {
	n := pr.n
	prior, s, pub, err := FixedGainCovariance(md.A, md.C, g.Gains[0].L, g.Form, md.Q, md.R)
	if err != nil {
		return err
	}
	g0 := &pr.gains[0]
	k := len(g0.idx)
	g0.chol = denseFlat(s)
	g0.sDiag = make([]float64, k)
	for i := range g0.sDiag {
		g0.sDiag[i] = s.At(i, i)
	}
	if !flatCholesky(g0.chol, k) {
		return fmt.Errorf("the innovation covariance of the full-pattern gain is not positive definite")
	}
	g0.invDiag = make([]float64, k)
	for i := range g0.invDiag {
		g0.invDiag[i] = 1 / g0.chol[i*k+i]
	}
	pr.setPrior, pr.setPub = denseFlat(prior), denseFlat(pub)
	pr.pFull = pr.setPub
	pr.std = make([]float64, n)
	for i := range pr.std {
		pr.std[i] = math.Sqrt(math.Max(pub.At(i, i), 0))
	}
	pr.q, pr.r = denseFlat(md.Q), denseFlat(md.R)
	pr.pss = steadyStatePrior(md, md.Q, md.R)
	pr.tracked = true
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
