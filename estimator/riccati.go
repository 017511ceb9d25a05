package estimator

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Tolerances of the matrix-equation solvers. A solution is returned only when
// its residual, measured in the Frobenius norm relative to the sum of the
// norms of the terms of the equation, is at most the tolerance:
//
//	DARE:      ‖AᵀXA − X − AᵀXB(R + BᵀXB)⁻¹BᵀXA + Q‖ ≤ 1e-10·(‖AᵀXA‖ + ‖X‖ + ‖AᵀXB(R + BᵀXB)⁻¹BᵀXA‖ + ‖Q‖)
//	Lyapunov:  ‖AXAᵀ + Q − X‖ ≤ 1e-10·(‖AXAᵀ‖ + ‖X‖ + ‖Q‖)
const (
	dareTolerance = 1e-10
	lyapTolerance = 1e-10
)

// SolveDARE returns the stabilising solution X of the discrete algebraic
// Riccati equation in control form
//
//	0 = AᵀXA − X − AᵀXB(R + BᵀXB)⁻¹BᵀXA + Q
//
// for A n×n, B n×m, Q n×n and R m×m, both symmetric positive semidefinite.
// The filter (estimation) equation is the same with (Aᵀ, Cᵀ).
//
// The equation is solved by the structure-preserving doubling algorithm
// (SDA) of Chu, Fan and Lin, which needs R⁻¹ but not A⁻¹. When R is singular
// or ill conditioned (reciprocal condition below 1e-12) the doubling is run
// with R + εI, ε = 1e-8·(‖R‖ + ‖BᵀQB‖) (or 1e-8 when both vanish), and its
// result refined on the exact equation by Newton's method (Hewer's
// iteration: each step solves a discrete Lyapunov equation for the current
// closed loop), which needs only R + BᵀXB to be invertible. The same Newton
// step also polishes a doubling result whose residual is not yet at rounding
// level.
//
// An error is returned when the data are not finite or not positive
// semidefinite, when the iteration fails, when the residual exceeds the
// tolerance documented above (relative 1e-10), or when the closed loop
// A − B·(R + BᵀXB)⁻¹BᵀXA is not Schur stable (then no stabilising solution
// exists: (A, B) is not stabilisable or (A, Q) has an unobservable mode on
// the unit circle).
func SolveDARE(a, b mat.Matrix, q, r mat.Symmetric) (*mat.SymDense, error) {
	n, nc := a.Dims()
	bn, m := b.Dims()
	if n != nc || bn != n || q.SymmetricDim() != n || r.SymmetricDim() != m {
		panic(fmt.Sprintf("estimator: SolveDARE with A %d×%d, B %d×%d, Q %d×%d, R %d×%d",
			n, nc, bn, m, q.SymmetricDim(), q.SymmetricDim(), r.SymmetricDim(), r.SymmetricDim()))
	}
	if !allFiniteMatrix(a) || !allFiniteMatrix(b) || !allFiniteMatrix(q) || !allFiniteMatrix(r) {
		return nil, errors.New("riccati: A, B, Q and R must be finite")
	}
	if err := checkPSD("Q", q); err != nil {
		return nil, fmt.Errorf("riccati: %w", err)
	}
	if err := checkPSD("R", r); err != nil {
		return nil, fmt.Errorf("riccati: %w", err)
	}
	ad := mat.DenseCopyOf(a)
	bd := mat.DenseCopyOf(b)
	qd := mat.NewSymDense(n, nil)
	qd.CopySym(q)
	rd := mat.NewSymDense(m, nil)
	rd.CopySym(r)

	// The doubling needs G = B·R⁻¹·Bᵀ.
	rr := rd
	var ch mat.Cholesky
	regularised := false
	if !ch.Factorize(rd) || ch.Cond() > 1e12 {
		regularised = true
		var bqb mat.Dense
		bqb.Product(bd.T(), qd, bd)
		eps := 1e-8 * (mat.Norm(rd, 2) + mat.Norm(&bqb, 2))
		if eps == 0 {
			eps = 1e-8
		}
		rr = mat.NewSymDense(m, nil)
		rr.CopySym(rd)
		for i := 0; i < m; i++ {
			rr.SetSym(i, i, rr.At(i, i)+eps)
		}
		if !ch.Factorize(rr) {
			return nil, errors.New("riccati: R + εI is not positive definite")
		}
	}
	var rinvbt mat.Dense
	if err := ch.SolveTo(&rinvbt, bd.T()); err != nil {
		return nil, fmt.Errorf("riccati: solving with R: %w", err)
	}
	var g mat.Dense
	g.Mul(bd, &rinvbt)
	x, err := sda(ad, symmetrise(&g), qd)
	if err != nil {
		return nil, fmt.Errorf("riccati: no stabilising solution found (is (A, B) stabilisable?): %w", err)
	}

	rel, err := dareResidual(ad, bd, qd, rd, x)
	if err != nil {
		return nil, fmt.Errorf("riccati: %w", err)
	}
	// Newton refinement on the exact equation.
	if regularised || rel > 1e-14 {
		for it := 0; it < 50; it++ {
			xn, err := hewerStep(ad, bd, qd, rd, x)
			if err != nil {
				if regularised && it == 0 {
					return nil, fmt.Errorf("riccati: refining the regularised solution: %w", err)
				}
				break
			}
			reln, err := dareResidual(ad, bd, qd, rd, xn)
			if err != nil {
				break
			}
			if reln >= rel && !(regularised && it == 0) {
				break
			}
			x, rel = xn, reln
			if rel <= 1e-15 {
				break
			}
		}
	}
	if !(rel <= dareTolerance) {
		return nil, fmt.Errorf("riccati: relative residual %.3g exceeds %.0e; the equation may have no stabilising solution or be too ill conditioned", rel, dareTolerance)
	}
	k, err := dareGain(bd, rd, x, ad)
	if err != nil {
		return nil, fmt.Errorf("riccati: %w", err)
	}
	var bk, acl mat.Dense
	bk.Mul(bd, k)
	acl.Sub(ad, &bk)
	if rho := spectralRadiusOf(&acl); !(rho < 1) {
		return nil, fmt.Errorf("riccati: no stabilising solution: the closed loop has spectral radius %.6g (is (A, B) stabilisable, and does Q see every mode on the unit circle?)", rho)
	}
	return x, nil
}

// sda runs the structure-preserving doubling algorithm for
// X = AᵀX(I + GX)⁻¹A + H:
//
//	W = I + GₖHₖ
//	Aₖ₊₁ = Aₖ W⁻¹ Aₖ
//	Gₖ₊₁ = Gₖ + Aₖ W⁻¹ Gₖ Aₖᵀ
//	Hₖ₊₁ = Hₖ + Aₖᵀ Hₖ W⁻¹ Aₖ
//
// with A₀ = A, G₀ = G, H₀ = H; Hₖ converges quadratically to X.
func sda(a *mat.Dense, g, h *mat.SymDense) (*mat.SymDense, error) {
	n, _ := a.Dims()
	ak := mat.DenseCopyOf(a)
	gk := mat.DenseCopyOf(g)
	hk := mat.DenseCopyOf(h)
	const maxIter = 100
	for it := 0; it < maxIter; it++ {
		w := mat.NewDense(n, n, nil)
		w.Mul(gk, hk)
		for i := 0; i < n; i++ {
			w.Set(i, i, w.At(i, i)+1)
		}
		var lu mat.LU
		lu.Factorize(w)
		if c := lu.Cond(); math.IsInf(c, 1) || c > 1e15 {
			return nil, fmt.Errorf("doubling iteration %d: I + G·H is singular (condition %.3g)", it, c)
		}
		// W⁻¹Aₖ and W⁻¹Gₖ.
		var wa, wg mat.Dense
		if err := solveOK(lu.SolveTo(&wa, false, ak)); err != nil {
			return nil, fmt.Errorf("doubling iteration %d: %w", it, err)
		}
		if err := solveOK(lu.SolveTo(&wg, false, gk)); err != nil {
			return nil, fmt.Errorf("doubling iteration %d: %w", it, err)
		}
		var an, gn, hn, t mat.Dense
		an.Mul(ak, &wa)
		t.Mul(ak, &wg)
		gn.Mul(&t, ak.T())
		gn.Add(&gn, gk)
		// Aₖᵀ·Hₖ·W⁻¹·Aₖ = Aₖᵀ·(Hₖ·(W⁻¹Aₖ)).
		var hwa mat.Dense
		hwa.Mul(hk, &wa)
		hn.Mul(ak.T(), &hwa)
		hn.Add(&hn, hk)
		symmetriseInPlace(&gn)
		symmetriseInPlace(&hn)
		if !allFiniteMatrix(&hn) || !allFiniteMatrix(&gn) || !allFiniteMatrix(&an) {
			return nil, fmt.Errorf("doubling iteration %d: the iterates overflowed", it)
		}
		var d mat.Dense
		d.Sub(&hn, hk)
		dn, hnn := mat.Norm(&d, 2), mat.Norm(&hn, 2)
		ak, gk, hk = &an, &gn, &hn
		if dn <= 1e-15*hnn || (dn == 0) {
			return symmetrise(hk), nil
		}
		if it > 5 && mat.Norm(ak, 2) <= 1e-300 {
			return symmetrise(hk), nil
		}
	}
	return nil, fmt.Errorf("the doubling iteration did not converge in %d steps (no stabilising solution?)", maxIter)
}

// dareGain returns K = (R + BᵀXB)⁻¹BᵀXA.
func dareGain(b *mat.Dense, r, x *mat.SymDense, a *mat.Dense) (*mat.Dense, error) {
	_, m := b.Dims()
	var bx, s, bxa mat.Dense
	bx.Mul(b.T(), x)
	s.Mul(&bx, b)
	s.Add(&s, r)
	bxa.Mul(&bx, a)
	ss := symmetrise(&s)
	var ch mat.Cholesky
	if ch.Factorize(ss) {
		var k mat.Dense
		if err := ch.SolveTo(&k, &bxa); err == nil {
			return &k, nil
		}
	}
	var k mat.Dense
	if err := solveOK(k.Solve(&s, &bxa)); err != nil {
		return nil, fmt.Errorf("R + BᵀXB (%d×%d) is singular: %w", m, m, err)
	}
	return &k, nil
}

// dareResidual returns the norm of the residual of the control DARE relative
// to the sum of the norms of its terms.
func dareResidual(a, b *mat.Dense, q, r, x *mat.SymDense) (float64, error) {
	k, err := dareGain(b, r, x, a)
	if err != nil {
		return 0, err
	}
	var axa, xa, axb, corr, res mat.Dense
	xa.Mul(x, a)
	axa.Mul(a.T(), &xa)
	var xb mat.Dense
	xb.Mul(x, b)
	axb.Mul(a.T(), &xb)
	corr.Mul(&axb, k)
	res.Sub(&axa, x)
	res.Sub(&res, &corr)
	res.Add(&res, q)
	scale := mat.Norm(&axa, 2) + mat.Norm(x, 2) + mat.Norm(&corr, 2) + mat.Norm(q, 2)
	rn := mat.Norm(&res, 2)
	if scale == 0 {
		if rn == 0 {
			return 0, nil
		}
		return math.Inf(1), nil
	}
	return rn / scale, nil
}

// hewerStep is one Newton step for the control DARE: with
// K = (R + BᵀXB)⁻¹BᵀXA and A_K = A − BK (which must be Schur stable) it
// returns the solution of X⁺ = A_KᵀX⁺A_K + Q + KᵀRK.
func hewerStep(a, b *mat.Dense, q, r, x *mat.SymDense) (*mat.SymDense, error) {
	k, err := dareGain(b, r, x, a)
	if err != nil {
		return nil, err
	}
	var bk, ak, rk, krk mat.Dense
	bk.Mul(b, k)
	ak.Sub(a, &bk)
	rk.Mul(r, k)
	krk.Mul(k.T(), &rk)
	krk.Add(&krk, q)
	return SolveDiscreteLyapunov(ak.T(), symmetrise(&krk))
}

// SolveDiscreteLyapunov returns the solution X of the discrete Lyapunov
// (Stein) equation X = A·X·Aᵀ + Q. A must be Schur stable (every eigenvalue
// strictly inside the unit circle); otherwise an error is returned. The
// solution is computed by Smith's doubling iteration X ← X + AₖXAₖᵀ,
// Aₖ₊₁ = Aₖ², and its residual checked against the tolerance documented at
// SolveDARE (relative 1e-10).
func SolveDiscreteLyapunov(a mat.Matrix, q mat.Symmetric) (*mat.SymDense, error) {
	n, nc := a.Dims()
	if n != nc || q.SymmetricDim() != n {
		panic(fmt.Sprintf("estimator: SolveDiscreteLyapunov with A %d×%d and Q %d×%d", n, nc, q.SymmetricDim(), q.SymmetricDim()))
	}
	if !allFiniteMatrix(a) || !allFiniteMatrix(q) {
		return nil, errors.New("lyapunov: A and Q must be finite")
	}
	if rho := spectralRadiusOf(a); !(rho < 1) {
		return nil, fmt.Errorf("lyapunov: A is not Schur stable (spectral radius %.6g)", rho)
	}
	ak := mat.DenseCopyOf(a)
	x := mat.DenseCopyOf(q)
	converged := false
	for it := 0; it < 80; it++ {
		var t, inc mat.Dense
		t.Mul(ak, x)
		inc.Mul(&t, ak.T())
		x.Add(x, &inc)
		if mat.Norm(&inc, 2) <= 1e-17*mat.Norm(x, 2) || mat.Norm(&inc, 2) == 0 {
			converged = true
			break
		}
		var sq mat.Dense
		sq.Mul(ak, ak)
		ak = &sq
		if !allFiniteMatrix(ak) || !allFiniteMatrix(x) {
			break
		}
	}
	if !converged {
		return nil, errors.New("lyapunov: Smith's iteration did not converge")
	}
	xs := symmetrise(x)
	var axa, res mat.Dense
	axa.Product(a, xs, a.T())
	res.Sub(xs, &axa)
	res.Sub(&res, q)
	scale := mat.Norm(&axa, 2) + mat.Norm(xs, 2) + mat.Norm(q, 2)
	if rn := mat.Norm(&res, 2); rn > lyapTolerance*scale {
		return nil, fmt.Errorf("lyapunov: relative residual %.3g exceeds %.0e", rn/scale, lyapTolerance)
	}
	return xs, nil
}

// KalmanGains is the steady-state Kalman filter for x(k+1) = A·x(k) + w,
// y = C·x + v with uncorrelated w ~ N(0, Q) and v ~ N(0, R).
type KalmanGains struct {
	P     *mat.SymDense // a priori (predicted) error covariance P(k|k−1), n×n
	Pplus *mat.SymDense // a posteriori (filtered) error covariance P(k|k), n×n
	S     *mat.SymDense // innovation covariance C·P·Cᵀ + R, p×p
	Lc    *mat.Dense    // current-form gain P·Cᵀ·S⁻¹, n×p
	Lp    *mat.Dense    // prediction-form gain A·Lc, n×p
}

// SteadyStateKalman returns the steady-state Kalman filter of (A, C, Q, R):
// P solves the filter DARE (SolveDARE with Aᵀ, Cᵀ), S = C·P·Cᵀ + R,
// Lc = P·Cᵀ·S⁻¹, Lp = A·Lc and P⁺ = (I − Lc·C)·P·(I − Lc·C)ᵀ + Lc·R·Lcᵀ
// (Joseph form). It fails when (A, C) is not detectable, when Q leaves a mode
// on the unit circle unexcited (no stabilising solution), or when S is not
// positive definite.
func SteadyStateKalman(a, c mat.Matrix, q, r mat.Symmetric) (KalmanGains, error) {
	n, nc := a.Dims()
	p, cn := c.Dims()
	if n != nc || cn != n || q.SymmetricDim() != n || r.SymmetricDim() != p {
		panic(fmt.Sprintf("estimator: SteadyStateKalman with A %d×%d, C %d×%d, Q %d×%d, R %d×%d",
			n, nc, p, cn, q.SymmetricDim(), q.SymmetricDim(), r.SymmetricDim(), r.SymmetricDim()))
	}
	if o := CheckObservability(a, c); !o.Detectable {
		return KalmanGains{}, fmt.Errorf("steady-state Kalman filter: (A, C) is not detectable: unstable %s unseen by the outputs", unseenModes(o, true))
	}
	pm, err := SolveDARE(a.T(), c.T(), q, r)
	if err != nil {
		return KalmanGains{}, fmt.Errorf("steady-state Kalman filter: %w", err)
	}
	var s mat.Dense
	s.Product(c, pm, c.T())
	s.Add(&s, r)
	ss := symmetrise(&s)
	var ch mat.Cholesky
	if !ch.Factorize(ss) {
		return KalmanGains{}, errors.New("steady-state Kalman filter: the innovation covariance C·P·Cᵀ + R is not positive definite")
	}
	// Lcᵀ = S⁻¹·C·P.
	var cp, lct mat.Dense
	cp.Mul(c, pm)
	if err := ch.SolveTo(&lct, &cp); err != nil {
		return KalmanGains{}, fmt.Errorf("steady-state Kalman filter: %w", err)
	}
	lc := mat.DenseCopyOf(lct.T())
	lp := mat.NewDense(n, p, nil)
	lp.Mul(a, lc)
	return KalmanGains{
		P:     pm,
		Pplus: josephUpdate(pm, c, lc, r),
		S:     ss,
		Lc:    lc,
		Lp:    lp,
	}, nil
}

// josephUpdate returns (I − L·C)·P·(I − L·C)ᵀ + L·R·Lᵀ.
func josephUpdate(p mat.Symmetric, c, l mat.Matrix, r mat.Symmetric) *mat.SymDense {
	n := p.SymmetricDim()
	ilc := mat.NewDense(n, n, nil)
	ilc.Mul(l, c)
	ilc.Scale(-1, ilc)
	for i := 0; i < n; i++ {
		ilc.Set(i, i, ilc.At(i, i)+1)
	}
	var out, lrl mat.Dense
	out.Product(ilc, p, ilc.T())
	lrl.Product(l, r, l.T())
	out.Add(&out, &lrl)
	return symmetrise(&out)
}

// FixedGainCovariance returns the steady-state error covariance of the
// observer with the fixed gain L (any gain whose error dynamics are Schur
// stable), for process noise Q and measurement noise R:
//
//   - Prediction: P = A_cl·P·A_clᵀ + Q + L·R·Lᵀ with A_cl = A − L·C.
//   - Current: the a priori P⁻ solves P⁻ = A·[(I − L·C)·P⁻·(I − L·C)ᵀ + L·R·Lᵀ]·Aᵀ + Q.
//
// p is the a priori covariance, s = C·p·Cᵀ + R the innovation covariance, and
// published the covariance of the estimate the form publishes: p itself for
// Prediction, the a posteriori (I − L·C)·p·(I − L·C)ᵀ + L·R·Lᵀ for Current.
// An error is returned when the error dynamics are not Schur stable.
func FixedGainCovariance(a, c, l mat.Matrix, form Form, q, r mat.Symmetric) (p, s, published *mat.SymDense, err error) {
	n, nc := a.Dims()
	pc, cn := c.Dims()
	ln, lp := l.Dims()
	if n != nc || cn != n || ln != n || lp != pc || q.SymmetricDim() != n || r.SymmetricDim() != pc {
		panic(fmt.Sprintf("estimator: FixedGainCovariance with A %d×%d, C %d×%d, L %d×%d, Q %d×%d, R %d×%d",
			n, nc, pc, cn, ln, lp, q.SymmetricDim(), q.SymmetricDim(), r.SymmetricDim(), r.SymmetricDim()))
	}
	var lrl mat.Dense
	lrl.Product(l, r, l.T())
	var trans *mat.Dense
	var drive mat.Dense
	switch form {
	case Prediction:
		trans = ErrorDynamics(a, c, l, Prediction)
		drive.Add(q, &lrl)
	case Current:
		// P⁻ = M·P⁻·Mᵀ + A·L·R·Lᵀ·Aᵀ + Q with M = A·(I − L·C).
		var lc mat.Dense
		lc.Mul(l, c)
		trans = mat.NewDense(n, n, nil)
		var alc mat.Dense
		alc.Mul(a, &lc)
		trans.Sub(a, &alc)
		drive.Product(a, &lrl, a.T())
		drive.Add(&drive, q)
	default:
		panic(fmt.Sprintf("estimator: FixedGainCovariance for form %v, want prediction or current", form))
	}
	p, err = SolveDiscreteLyapunov(trans, symmetrise(&drive))
	if err != nil {
		return nil, nil, nil, fmt.Errorf("fixed-gain covariance (%v form): the gain is not stabilising: %w", form, err)
	}
	var sd mat.Dense
	sd.Product(c, p, c.T())
	sd.Add(&sd, r)
	s = symmetrise(&sd)
	published = p
	if form == Current {
		published = josephUpdate(p, c, l, r)
	}
	return p, s, published, nil
}

// checkPSD returns an error when the symmetric matrix s has an eigenvalue
// below −1e-12·max(1, ‖s‖).
func checkPSD(name string, s mat.Symmetric) error {
	var e mat.EigenSym
	if !e.Factorize(s, false) {
		return fmt.Errorf("%s: eigenvalue decomposition failed", name)
	}
	v := e.Values(nil)
	top := 0.0
	for _, x := range v {
		top = math.Max(top, math.Abs(x))
	}
	if v[0] < -1e-12*math.Max(1, top) {
		return fmt.Errorf("%s is not positive semidefinite (smallest eigenvalue %.3g)", name, v[0])
	}
	return nil
}

// symmetrise returns (m + mᵀ)/2 as a SymDense.
func symmetrise(m mat.Matrix) *mat.SymDense {
	n, _ := m.Dims()
	out := mat.NewSymDense(n, nil)
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			out.SetSym(i, j, (m.At(i, j)+m.At(j, i))/2)
		}
	}
	return out
}

func symmetriseInPlace(m *mat.Dense) {
	n, _ := m.Dims()
	for i := 0; i < n; i++ {
		for j := i + 1; j < n; j++ {
			v := (m.At(i, j) + m.At(j, i)) / 2
			m.Set(i, j, v)
			m.Set(j, i, v)
		}
	}
}
