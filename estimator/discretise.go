package estimator

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Discretise converts the continuous-time model
//
//	ẋ(t) = A·x(t) + B·u(t) + w(t),   E[w(t)·w(s)ᵀ] = Qc·δ(t − s)
//
// into the discrete-time model x(k+1) = Ad·x(k) + Bd·u(k) + w(k) with sample
// time ts seconds, holding u constant between samples (zero-order hold), and
// returns Ad, Bd and the covariance Qd of the discrete process noise w(k).
//
// Ad and Bd come from one matrix exponential of the augmented matrix
//
//	exp([[A, B], [0, 0]]·ts) = [[Ad, Bd], [0, I]],
//
// so Bd = ∫₀^ts e^{A·s} ds · B is right also when A is singular (an
// integrator), where the closed form A⁻¹(Ad − I)B is not defined.
//
// Qd = ∫₀^ts e^{A·s}·Qc·e^{Aᵀ·s} ds is computed by Van Loan's method
// (C. F. Van Loan, "Computing integrals involving the matrix exponential",
// IEEE Trans. Automatic Control 23(3), 1978): with
//
//	exp([[−A, Qc], [0, Aᵀ]]·ts) = [[F11, F12], [0, F22]],
//
// Ad = F22ᵀ and Qd = F22ᵀ·F12. F12 grows like e^{−A·ts}, so for a long sample
// and fast stable modes the product F22ᵀ·F12 cancels and loses digits (on the
// long-sample fixture in testdata/reference, 7e-13 relative with gonum's
// exponential and 7e-10 with scipy's; 2e-15 with the halving below). Discretise
// therefore applies the formula over h = ts/2^s, with s the smallest count
// that brings ‖A‖₁·h down to 1/2, and doubles the interval back s times with
// Q(2h) = Q(h) + Φ(h)·Q(h)·Φ(h)ᵀ, Φ(2h) = Φ(h)², a sum of positive
// semidefinite terms that loses nothing. Qd is symmetrised, (Qd + Qdᵀ)/2, to
// remove the rounding that makes the products slightly asymmetric. Qc is a spectral
// density (units of x² per second): when the noise enters through a matrix G,
// pass G·Qc·Gᵀ. A nil qc gives a nil qd. A nil b gives a nil bd (a model
// without inputs).
//
// The matrix exponentials are gonum's mat.Dense.Exp (scaling and squaring with
// Padé approximants, Higham's algorithm); the tests check it against the stiff
// example and scipy's values (testdata/reference/SOURCES.md).
//
// Discretise panics if A is not square, if B or Qc do not have as many rows as
// A, or if ts is not a finite positive number: these are programmer mistakes,
// as the config package validates a plant file before calling it. The entries
// of A, B and Qc must be finite.
func Discretise(a, b mat.Matrix, qc mat.Symmetric, ts float64) (ad, bd *mat.Dense, qd *mat.SymDense) {
	n, nc := a.Dims()
	if n != nc {
		panic(fmt.Sprintf("estimator: Discretise: A is %d×%d, want a square matrix", n, nc))
	}
	m := 0
	if b != nil {
		var bn int
		bn, m = b.Dims()
		if bn != n {
			panic(fmt.Sprintf("estimator: Discretise: B has %d rows, want %d (the rows of A)", bn, n))
		}
	}
	if qc != nil {
		if r := qc.SymmetricDim(); r != n {
			panic(fmt.Sprintf("estimator: Discretise: Qc is %d×%d, want %d×%d", r, r, n, n))
		}
	}
	if !(ts > 0) || math.IsInf(ts, 0) {
		panic(fmt.Sprintf("estimator: Discretise: sample time %v, want a finite positive number", ts))
	}

	// Zero-order hold: exp([[A, B], [0, 0]]·ts).
	k := n + m
	aug := mat.NewDense(k, k, nil)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			aug.Set(i, j, a.At(i, j)*ts)
		}
		for j := 0; j < m; j++ {
			aug.Set(i, n+j, b.At(i, j)*ts)
		}
	}
	var e mat.Dense
	e.Exp(aug)
	ad = mat.DenseCopyOf(e.Slice(0, n, 0, n))
	if m > 0 {
		bd = mat.DenseCopyOf(e.Slice(0, n, n, k))
	}

	if qc == nil {
		return ad, bd, nil
	}

	// Van Loan on a short interval h = ts/2^s, then doubled back to ts.
	h, steps := ts, 0
	for norm := mat.Norm(a, 1) * ts; norm > vanLoanNorm && steps < maxDoublings; norm /= 2 {
		h /= 2
		steps++
	}
	vl := mat.NewDense(2*n, 2*n, nil)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			vl.Set(i, j, -a.At(i, j)*h)
			vl.Set(i, n+j, qc.At(i, j)*h)
			vl.Set(n+i, n+j, a.At(j, i)*h)
		}
	}
	var f mat.Dense
	f.Exp(vl)
	phi := mat.DenseCopyOf(f.Slice(n, 2*n, n, 2*n).T())
	var prod, tmp mat.Dense
	prod.Mul(phi, f.Slice(0, n, n, 2*n))
	for ; steps > 0; steps-- {
		// Q(2h) = Q(h) + Φ(h)·Q(h)·Φ(h)ᵀ and Φ(2h) = Φ(h)².
		tmp.Mul(phi, &prod)
		var next mat.Dense
		next.Mul(&tmp, phi.T())
		prod.Add(&prod, &next)
		next.Mul(phi, phi)
		phi = &next
	}
	qd = mat.NewSymDense(n, nil)
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			qd.SetSym(i, j, (prod.At(i, j)+prod.At(j, i))/2)
		}
	}
	return ad, bd, qd
}

const (
	// vanLoanNorm bounds ‖A‖₁·h for the interval h on which Van Loan's
	// block exponential is evaluated; e^{1/2} growth costs no digits.
	vanLoanNorm = 0.5
	// maxDoublings caps the halving for absurdly large ‖A‖·ts.
	maxDoublings = 64
)
