package estimator

import (
	"fmt"
	"math"
	"math/cmplx"
	"sort"

	"gonum.org/v1/gonum/mat"
)

// Eigenvalues returns the eigenvalues of the square matrix a, sorted by
// descending modulus, then descending real part, then descending imaginary
// part, so that a complex-conjugate pair appears with its positive member first.
// It returns nil when a has a non-finite entry or the eigenvalue iteration does
// not converge.
func Eigenvalues(a mat.Matrix) []complex128 {
	r, c := a.Dims()
	if r != c {
		panic(fmt.Sprintf("estimator: Eigenvalues of a %d×%d matrix, want a square one", r, c))
	}
	if !allFiniteMatrix(a) {
		return nil
	}
	var e mat.Eigen
	if !e.Factorize(a, mat.EigenNone) {
		return nil
	}
	v := e.Values(nil)
	sortEigen(v)
	return v
}

// sortEigen sorts v into the order documented by Eigenvalues.
func sortEigen(v []complex128) {
	sort.SliceStable(v, func(i, j int) bool {
		ai, aj := cmplx.Abs(v[i]), cmplx.Abs(v[j])
		if ai != aj {
			return ai > aj
		}
		if real(v[i]) != real(v[j]) {
			return real(v[i]) > real(v[j])
		}
		return imag(v[i]) > imag(v[j])
	})
}

// spectralRadiusOf returns the largest eigenvalue modulus of the square matrix
// a, or +Inf when the eigenvalues cannot be computed.
func spectralRadiusOf(a mat.Matrix) float64 {
	ev := Eigenvalues(a)
	if ev == nil {
		return math.Inf(1)
	}
	return cmplx.Abs(ev[0])
}

// ErrorDynamics returns the estimation-error transition matrix of a fixed-gain
// observer: A − L·C for the prediction form and A − L·C·A for the current
// form. It panics for any other form or when the dimensions do not agree.
func ErrorDynamics(a, c, l mat.Matrix, form Form) *mat.Dense {
	n, nc := a.Dims()
	p, cn := c.Dims()
	ln, lp := l.Dims()
	if n != nc || cn != n || ln != n || lp != p {
		panic(fmt.Sprintf("estimator: ErrorDynamics with A %d×%d, C %d×%d, L %d×%d", n, nc, p, cn, ln, lp))
	}
	var lc mat.Dense
	lc.Mul(l, c)
	out := mat.NewDense(n, n, nil)
	switch form {
	case Prediction:
		out.Sub(a, &lc)
	case Current:
		var lca mat.Dense
		lca.Mul(&lc, a)
		out.Sub(a, &lca)
	default:
		panic(fmt.Sprintf("estimator: ErrorDynamics for form %v, want prediction or current", form))
	}
	return out
}

// OutputRows returns a new matrix holding the rows of c (any matrix with one
// row per output) for the outputs in s, in ascending output order. It panics
// when s is empty or names a row c does not have.
func OutputRows(c mat.Matrix, s Pattern) *mat.Dense {
	p, n := c.Dims()
	idx := patternIndices(s, p)
	out := mat.NewDense(len(idx), n, nil)
	for i, k := range idx {
		for j := 0; j < n; j++ {
			out.Set(i, j, c.At(k, j))
		}
	}
	return out
}

// OutputCov returns a new matrix holding the block of the output covariance r
// for the outputs in s. It panics when s is empty or names an output r does
// not have.
func OutputCov(r mat.Symmetric, s Pattern) *mat.SymDense {
	idx := patternIndices(s, r.SymmetricDim())
	out := mat.NewSymDense(len(idx), nil)
	for i, ki := range idx {
		for j := i; j < len(idx); j++ {
			out.SetSym(i, j, r.At(ki, idx[j]))
		}
	}
	return out
}

func patternIndices(s Pattern, p int) []int {
	if s == 0 {
		panic("estimator: empty output pattern")
	}
	if p < 64 && s&^FullPattern(p) != 0 {
		panic(fmt.Sprintf("estimator: pattern %#x names outputs beyond the %d there are", uint64(s), p))
	}
	return s.Indices(nil)
}
