package estimator

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// DefaultALSLags is the number of autocovariance lags (0 to 29) IdentifyNoise
// fits when ALSSettings.Lags is zero.
const DefaultALSLags = 30

// DefaultALSSegments is the number of disjoint segments whose separate
// estimates give the uncertainty of each element when ALSSettings.Segments
// is zero.
const DefaultALSSegments = 5

// ALSSettings are the choices of IdentifyNoise. The zero value fits
// DefaultALSLags lags of diagonal covariances with the discrete process
// noise as the unknown, skips the filter's transient automatically and
// splits the data into DefaultALSSegments segments for the uncertainty.
type ALSSettings struct {
	// Lags is N, the number of autocovariance lags 0, …, N−1 fitted; 0 means
	// DefaultALSLags.
	Lags int
	// ProcessFull and MeasurementFull ask for a full (symmetric) covariance
	// to be identified; false identifies the diagonal only, the others held
	// at zero.
	ProcessFull, MeasurementFull bool
	// ProcessToDiscrete maps the process noise as declared (for example a
	// continuous spectral density, see Discretise) to the covariance Q of
	// one sample of the discrete model. It must be linear and map positive
	// semidefinite matrices to positive semidefinite ones. Nil means the
	// declared matrix is the discrete Q.
	ProcessToDiscrete func(*mat.SymDense) *mat.SymDense
	// Segments is the number of disjoint, equal segments of the data whose
	// separate estimates give each element's standard error; 0 means
	// DefaultALSSegments, 1 gives no standard errors (NaN).
	Segments int
	// Skip is the number of ticks after the start and after every break in
	// the data (a tick where an output is missing) that are not used, while
	// the filter's error settles. 0 means automatic: the ticks it takes the
	// error dynamics A − L·C to shrink by 1000 (ρ^k ≤ 10⁻³), at most 200.
	// A negative Skip uses every tick.
	Skip int
}

// ALSElement is one unknown element of an identified covariance.
type ALSElement struct {
	// Process is true for an element of the process noise (as declared,
	// see ALSSettings.ProcessToDiscrete), false for the measurement noise.
	Process bool
	// I, J are its row and column, I ≤ J.
	I, J int
	// Value is the estimate (a covariance, not a standard deviation).
	Value float64
	// StdErr is the standard error of Value from the spread of the
	// segments' estimates (their standard deviation over √segments); NaN
	// when there are fewer than two usable segments.
	StdErr float64
	// Identified says the data determine the element: it has no component
	// in the null space of the least-squares system. An element that is
	// not identified keeps the value the constraint and the other elements
	// leave it, which the data cannot confirm.
	Identified bool
}

// ALSResult is what IdentifyNoise found.
type ALSResult struct {
	// Q is the process noise as declared (the argument of
	// ProcessToDiscrete), Qd the covariance of one sample, R the
	// measurement noise covariance; all positive semidefinite.
	Q, Qd, R *mat.SymDense
	// Elements are the unknowns, process then measurement, in row-major
	// order of their upper triangles.
	Elements []ALSElement
	// Unknowns is the number of unknowns, Equations the number of rows of
	// the least-squares system, Rank its numerical rank.
	Unknowns, Equations, Rank int
	// Cond is the condition number of the (column-scaled) least-squares
	// matrix: its largest singular value over its smallest; +Inf when it is
	// rank deficient. CondIdentified is the same over the identified part
	// (the largest over the smallest nonzero singular value).
	Cond, CondIdentified float64
	// Ticks is the number of ticks with every output present that the
	// lag-0 autocovariance used (after skipping); Skip the ticks skipped
	// after the start and every break.
	Ticks, Skip int
	// Constrained says the unconstrained least-squares solution was not
	// positive semidefinite and the estimate is the constrained one.
	Constrained bool
	// Autocov holds the sample autocovariances the fit used,
	// Autocov[j] = Ĉ_j = mean over k of r(k+j)·r(k)ᵀ, p×p.
	Autocov []*mat.Dense
}

// IdentifyNoise estimates the process and measurement noise covariances of
// the model x(k+1) = A·x(k) + w, y = C·x + v from the innovations of a
// prediction-form filter with the fixed gain L that ran on its data, by
// autocovariance least squares (Odelson, Rajamani and Rawlings, "A new
// autocovariance least-squares method for estimating noise covariances",
// Automatica 42(2), 2006).
//
// The state error e = x − x̂(k|k−1) of that filter obeys
// e(k+1) = Ā·e(k) + w − L·v with Ā = A − L·C, and its innovations
// r = C·e + v have the autocovariances
//
//	C₀ = C·P·Cᵀ + R,  Cⱼ = C·Āʲ·P·Cᵀ − C·Āʲ⁻¹·L·R  (j ≥ 1),
//	P  = Ā·P·Āᵀ + Q + L·R·Lᵀ,
//
// linear in Q and R. Stacking the upper triangle of C₀ and all of C₁, …,
// C_{N−1} gives a linear system M·θ = b in the unknown elements θ, with b
// the sample autocovariances of innov. The columns of M are scaled to unit
// norm (by a congruence, so positive semidefiniteness is kept); the system's
// singular values give the rank and condition, and the elements touched by
// its null space are reported as not identified. The estimate minimises
// ‖M·θ − b‖ over positive semidefinite Q (as declared) and R — diagonal
// ones by non-negative elements — by accelerated projected gradient
// (projection on the cone by clipping eigenvalues), started from the
// least-squares solution of minimum norm; where that is already positive
// semidefinite it is the estimate. The weighting is the identity, the
// paper's basic form.
//
// innov[j][k] is output j's innovation at tick k, NaN when the output was
// not measured or was rejected; a tick missing any output breaks the data
// (the filter ran with another gain there), and lags are taken only within
// unbroken stretches, after Skip ticks. A must be n×n, C p×n, L n×p, and
// A − L·C Schur stable; innov must have p columns of equal length. Wrong
// dimensions panic; too little data, or an unstable A − L·C, is an error.
func IdentifyNoise(a, c, l mat.Matrix, innov [][]float64, set ALSSettings) (*ALSResult, error) {
	n, nc := a.Dims()
	p, cn := c.Dims()
	ln, lp := l.Dims()
	if n != nc || cn != n || ln != n || lp != p || len(innov) != p {
		panic(fmt.Sprintf("estimator: IdentifyNoise with A %d×%d, C %d×%d, L %d×%d and %d innovation columns", n, nc, p, cn, ln, lp, len(innov)))
	}
	ticks := len(innov[0])
	for j := range innov {
		if len(innov[j]) != ticks {
			panic(fmt.Sprintf("estimator: IdentifyNoise with innovation columns of %d and %d ticks", ticks, len(innov[j])))
		}
	}
	if set.Lags == 0 {
		set.Lags = DefaultALSLags
	}
	if set.Lags < 1 {
		return nil, fmt.Errorf("als: %d lags, want at least 1", set.Lags)
	}
	if set.Segments == 0 {
		set.Segments = DefaultALSSegments
	}
	if set.Segments < 1 {
		return nil, fmt.Errorf("als: %d segments, want at least 1", set.Segments)
	}
	toDiscrete := set.ProcessToDiscrete
	if toDiscrete == nil {
		toDiscrete = func(q *mat.SymDense) *mat.SymDense { return q }
	}
	var abar mat.Dense
	abar.Mul(l, c)
	abar.Sub(a, &abar)
	rho := spectralRadiusOf(&abar)
	if !(rho < 1) {
		return nil, fmt.Errorf("als: the filter's error dynamics A − L·C are not stable (spectral radius %.6g)", rho)
	}
	skip := set.Skip
	switch {
	case skip < 0:
		skip = 0
	case skip == 0:
		skip = 200
		if rho > 0 {
			skip = min(200, int(math.Ceil(math.Log(1e-3)/math.Log(rho))))
		} else {
			skip = 1
		}
	}

	sys, err := alsSystem(&abar, c, l, set, toDiscrete)
	if err != nil {
		return nil, err
	}
	res := &ALSResult{Unknowns: len(sys.params), Equations: sys.rows, Skip: skip}

	full := alsAutocov(innov, 0, ticks, set.Lags, skip)
	if full.count[set.Lags-1] == 0 {
		return nil, fmt.Errorf("als: no stretch of %d ticks with every output present after skipping %d (of %d ticks): too little data for %d lags", set.Lags+skip, skip, ticks, set.Lags)
	}
	res.Ticks = full.count[0]
	res.Autocov = full.cov
	theta, constrained := sys.solve(full.vector(p, set.Lags))
	res.Constrained = constrained
	res.Rank, res.Cond, res.CondIdentified = sys.rank, sys.cond, sys.condIdentified

	// Uncertainty from disjoint segments.
	var segs [][]float64
	if set.Segments > 1 {
		for s := 0; s < set.Segments; s++ {
			lo, hi := s*ticks/set.Segments, (s+1)*ticks/set.Segments
			ac := alsAutocov(innov, lo, hi, set.Lags, skip)
			if ac.count[set.Lags-1] == 0 {
				continue
			}
			th, _ := sys.solve(ac.vector(p, set.Lags))
			segs = append(segs, th)
		}
	}
	for i, pr := range sys.params {
		v := theta[i] * sys.scale[i]
		e := ALSElement{Process: pr.process, I: pr.i, J: pr.j, Value: v, StdErr: math.NaN(), Identified: sys.identified[i]}
		if len(segs) >= 2 {
			mean, sq := 0.0, 0.0
			for _, th := range segs {
				mean += th[i] * sys.scale[i]
			}
			mean /= float64(len(segs))
			for _, th := range segs {
				d := th[i]*sys.scale[i] - mean
				sq += d * d
			}
			e.StdErr = math.Sqrt(sq/float64(len(segs)-1)) / math.Sqrt(float64(len(segs)))
		}
		res.Elements = append(res.Elements, e)
	}
	res.Q, res.R = sys.matrices(theta)
	res.Qd = toDiscrete(res.Q)
	return res, nil
}

// alsParam is one unknown: element (i, j) of Q (process) or R.
type alsParam struct {
	process bool
	i, j    int
}

// alsSys is the scaled least-squares system of IdentifyNoise.
type alsSys struct {
	n, p   int
	params []alsParam
	scale  []float64  // θ_declared = scale·θ_scaled
	m      *mat.Dense // rows × unknowns, scaled columns
	rows   int
	pinv   *mat.Dense // minimum-norm pseudo-inverse, unknowns × rows
	lip    float64    // largest singular value squared
	rank   int
	cond   float64
	// condIdentified is over the nonzero singular values.
	condIdentified float64
	identified     []bool
	qFull, rFull   bool
}

// alsModelAutocov returns the stacked model autocovariances (upper triangle
// of C₀, then C₁ … C_{N−1} row-major) for the discrete Q and R given.
func alsModelAutocov(abar *mat.Dense, c, l mat.Matrix, qd, r *mat.SymDense, lags int) ([]float64, error) {
	n, _ := abar.Dims()
	p, _ := c.Dims()
	var lrl mat.Dense
	lrl.Product(l, r, l.T())
	src := mat.NewSymDense(n, nil)
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			src.SetSym(i, j, qd.At(i, j)+0.5*(lrl.At(i, j)+lrl.At(j, i)))
		}
	}
	pm, err := SolveDiscreteLyapunov(abar, src)
	if err != nil {
		return nil, fmt.Errorf("als: %w", err)
	}
	out := make([]float64, 0, p*(p+1)/2+(lags-1)*p*p)
	var c0 mat.Dense
	c0.Product(c, pm, c.T())
	c0.Add(&c0, r)
	for i := 0; i < p; i++ {
		for j := i; j < p; j++ {
			out = append(out, c0.At(i, j))
		}
	}
	// pc = P·Cᵀ, lr = L·R; advanced by Ā each lag.
	var pc, lr mat.Dense
	pc.Mul(pm, c.T())
	lr.Mul(l, r)
	var apc, alr mat.Dense
	apc.Mul(abar, &pc) // Ā·P·Cᵀ
	alr.CloneFrom(&lr) // Ā⁰·L·R
	for k := 1; k < lags; k++ {
		var cj, t mat.Dense
		cj.Mul(c, &apc)
		t.Mul(c, &alr)
		cj.Sub(&cj, &t)
		for i := 0; i < p; i++ {
			for j := 0; j < p; j++ {
				out = append(out, cj.At(i, j))
			}
		}
		var nextP, nextL mat.Dense
		nextP.Mul(abar, &apc)
		nextL.Mul(abar, &alr)
		apc, alr = nextP, nextL
	}
	return out, nil
}

// alsSystem builds the scaled least-squares matrix and its decomposition.
func alsSystem(abar *mat.Dense, c, l mat.Matrix, set ALSSettings, toDiscrete func(*mat.SymDense) *mat.SymDense) (*alsSys, error) {
	n, _ := abar.Dims()
	p, _ := c.Dims()
	s := &alsSys{n: n, p: p, qFull: set.ProcessFull, rFull: set.MeasurementFull}
	for _, blk := range []struct {
		process, full bool
		size          int
	}{{true, set.ProcessFull, n}, {false, set.MeasurementFull, p}} {
		for i := 0; i < blk.size; i++ {
			for j := i; j < blk.size; j++ {
				if i == j || blk.full {
					s.params = append(s.params, alsParam{process: blk.process, i: i, j: j})
				}
			}
		}
	}
	var cols [][]float64
	for _, pr := range s.params {
		qd, r := mat.NewSymDense(n, nil), mat.NewSymDense(p, nil)
		if pr.process {
			e := mat.NewSymDense(n, nil)
			e.SetSym(pr.i, pr.j, 1)
			qd = toDiscrete(e)
		} else {
			r.SetSym(pr.i, pr.j, 1)
		}
		col, err := alsModelAutocov(abar, c, l, qd, r, set.Lags)
		if err != nil {
			return nil, err
		}
		cols = append(cols, col)
	}
	s.rows = len(cols[0])
	// Congruence scaling: element (i, j) of a matrix scaled by d_i·d_j with
	// d_i = 1/√‖column of (i, i)‖, so that diagonal columns have unit norm.
	diag := map[[2]int]float64{} // (process?1:0, i) → d_i
	for k, pr := range s.params {
		if pr.i == pr.j {
			nrm := 0.0
			for _, v := range cols[k] {
				nrm += v * v
			}
			d := 1.0
			if nrm > 0 {
				d = 1 / math.Sqrt(math.Sqrt(nrm))
			}
			diag[[2]int{b2i(pr.process), pr.i}] = d
		}
	}
	s.scale = make([]float64, len(s.params))
	s.m = mat.NewDense(s.rows, len(s.params), nil)
	for k, pr := range s.params {
		sc := diag[[2]int{b2i(pr.process), pr.i}] * diag[[2]int{b2i(pr.process), pr.j}]
		s.scale[k] = sc
		for r, v := range cols[k] {
			s.m.Set(r, k, v*sc)
		}
	}
	var svd mat.SVD
	if !svd.Factorize(s.m, mat.SVDThin) {
		return nil, errors.New("als: the singular value decomposition of the least-squares system failed")
	}
	sv := svd.Values(nil)
	var u, v mat.Dense
	svd.UTo(&u)
	svd.VTo(&v)
	smax := sv[0]
	tol := 1e-9 * smax * float64(max(s.rows, len(s.params)))
	s.lip = smax * smax
	for _, x := range sv {
		if x > tol {
			s.rank++
		}
	}
	s.cond = math.Inf(1)
	if s.rank == len(s.params) && len(sv) == len(s.params) {
		s.cond = smax / sv[len(sv)-1]
	}
	s.condIdentified = math.NaN()
	if s.rank > 0 {
		s.condIdentified = smax / sv[s.rank-1]
	}
	// Pseudo-inverse over the first rank singular triplets.
	k := len(s.params)
	s.pinv = mat.NewDense(k, s.rows, nil)
	for i := 0; i < s.rank; i++ {
		for a := 0; a < k; a++ {
			va := v.At(a, i) / sv[i]
			if va == 0 {
				continue
			}
			for r := 0; r < s.rows; r++ {
				s.pinv.Set(a, r, s.pinv.At(a, r)+va*u.At(r, i))
			}
		}
	}
	// An element is identified when its unit vector has (almost) no
	// component in the null space: the columns of V beyond the rank.
	s.identified = make([]bool, k)
	for a := 0; a < k; a++ {
		nul := 0.0
		for i := s.rank; i < k; i++ {
			nul += v.At(a, i) * v.At(a, i)
		}
		s.identified[a] = math.Sqrt(nul) < 1e-6
	}
	return s, nil
}

func b2i(b bool) int {
	if b {
		return 1
	}
	return 0
}

// solve returns the scaled estimate for the stacked sample autocovariances
// b, and whether the constraint changed the least-squares solution.
func (s *alsSys) solve(b []float64) ([]float64, bool) {
	k := len(s.params)
	bv := mat.NewVecDense(len(b), b)
	var t0 mat.VecDense
	t0.MulVec(s.pinv, bv)
	theta := append([]float64(nil), t0.RawVector().Data...)
	x := append([]float64(nil), theta...)
	s.project(x)
	moved := 0.0
	for i := range x {
		moved = math.Max(moved, math.Abs(x[i]-theta[i]))
	}
	if moved <= 1e-14*(1+maxAbsOf(theta)) {
		return x, false
	}
	// Accelerated projected gradient (FISTA) on ½‖M·θ − b‖².
	y := append([]float64(nil), x...)
	prev := append([]float64(nil), x...)
	grad := mat.NewVecDense(k, nil)
	resid := mat.NewVecDense(s.rows, nil)
	tk := 1.0
	for it := 0; it < 20000; it++ {
		resid.MulVec(s.m, mat.NewVecDense(k, y))
		resid.SubVec(resid, bv)
		grad.MulVec(s.m.T(), resid)
		copy(prev, x)
		for i := range x {
			x[i] = y[i] - grad.AtVec(i)/s.lip
		}
		s.project(x)
		tn := (1 + math.Sqrt(1+4*tk*tk)) / 2
		step := 0.0
		for i := range x {
			y[i] = x[i] + (tk-1)/tn*(x[i]-prev[i])
			step = math.Max(step, math.Abs(x[i]-prev[i]))
		}
		tk = tn
		if step <= 1e-13*(1+maxAbsOf(x)) {
			break
		}
	}
	return x, true
}

func maxAbsOf(v []float64) float64 {
	m := 0.0
	for _, x := range v {
		m = math.Max(m, math.Abs(x))
	}
	return m
}

// project moves the scaled unknowns to the nearest point (in the scaled
// coordinates) where both matrices are positive semidefinite: a diagonal
// one by clipping at zero, a full one by clipping its eigenvalues.
func (s *alsSys) project(theta []float64) {
	for _, blk := range []struct {
		process, full bool
		size          int
	}{{true, s.qFull, s.n}, {false, s.rFull, s.p}} {
		if !blk.full {
			for k, pr := range s.params {
				if pr.process == blk.process && theta[k] < 0 {
					theta[k] = 0
				}
			}
			continue
		}
		m := mat.NewSymDense(blk.size, nil)
		for k, pr := range s.params {
			if pr.process == blk.process {
				m.SetSym(pr.i, pr.j, theta[k])
			}
		}
		var eig mat.EigenSym
		if !eig.Factorize(m, true) {
			continue
		}
		vals := eig.Values(nil)
		if vals[0] >= 0 {
			continue
		}
		var vecs mat.Dense
		eig.VectorsTo(&vecs)
		for i := range vals {
			vals[i] = math.Max(vals[i], 0)
		}
		var proj mat.Dense
		proj.Product(&vecs, mat.NewDiagDense(len(vals), vals), vecs.T())
		for k, pr := range s.params {
			if pr.process == blk.process {
				theta[k] = proj.At(pr.i, pr.j)
			}
		}
	}
}

// matrices turns the scaled unknowns into Q (as declared) and R.
func (s *alsSys) matrices(theta []float64) (q, r *mat.SymDense) {
	q, r = mat.NewSymDense(s.n, nil), mat.NewSymDense(s.p, nil)
	for k, pr := range s.params {
		v := theta[k] * s.scale[k]
		if pr.process {
			q.SetSym(pr.i, pr.j, v)
		} else {
			r.SetSym(pr.i, pr.j, v)
		}
	}
	return q, r
}

// alsData is the sample autocovariances of a stretch of innovations.
type alsData struct {
	cov   []*mat.Dense // per lag, p×p
	count []int        // products summed per lag
}

// alsAutocov computes Ĉ_j = Σ r(k+j)·r(k)ᵀ / count_j over ticks k in
// [lo, hi) such that ticks k … k+j lie in [lo, hi), have every output, and
// k is at least skip ticks after the start of its unbroken stretch.
func alsAutocov(innov [][]float64, lo, hi, lags, skip int) alsData {
	p := len(innov)
	d := alsData{cov: make([]*mat.Dense, lags), count: make([]int, lags)}
	sums := make([][]float64, lags)
	for j := range sums {
		sums[j] = make([]float64, p*p)
	}
	complete := func(k int) bool {
		for j := 0; j < p; j++ {
			if math.IsNaN(innov[j][k]) || math.IsInf(innov[j][k], 0) {
				return false
			}
		}
		return true
	}
	runStart := lo // first tick of the current unbroken stretch
	// runEnd[k]: the ticks from k on that are complete, counted lazily by
	// scanning each stretch once.
	k := lo
	for k < hi {
		if !complete(k) {
			k++
			runStart = k
			continue
		}
		end := k
		for end < hi && complete(end) {
			end++
		}
		// ticks [k, end) are complete; k is the stretch's first.
		runStart = k
		for t := runStart + skip; t < end; t++ {
			for lag := 0; lag < lags && t+lag < end; lag++ {
				s := sums[lag]
				for a := 0; a < p; a++ {
					ya := innov[a][t+lag]
					for b := 0; b < p; b++ {
						s[a*p+b] += ya * innov[b][t]
					}
				}
				d.count[lag]++
			}
		}
		k = end
	}
	for j := range sums {
		d.cov[j] = mat.NewDense(p, p, nil)
		if d.count[j] > 0 {
			for i, v := range sums[j] {
				d.cov[j].Set(i/p, i%p, v/float64(d.count[j]))
			}
		}
	}
	return d
}

// vector stacks the upper triangle of Ĉ₀ and all of Ĉ₁ … Ĉ_{N−1}; C₀'s
// triangle is symmetrised.
func (d alsData) vector(p, lags int) []float64 {
	out := make([]float64, 0, p*(p+1)/2+(lags-1)*p*p)
	for i := 0; i < p; i++ {
		for j := i; j < p; j++ {
			out = append(out, 0.5*(d.cov[0].At(i, j)+d.cov[0].At(j, i)))
		}
	}
	for l := 1; l < lags; l++ {
		for i := 0; i < p; i++ {
			for j := 0; j < p; j++ {
				out = append(out, d.cov[l].At(i, j))
			}
		}
	}
	return out
}
