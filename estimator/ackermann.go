package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"
)

// charPoly returns the real coefficients c₁…cₙ of ∏(s − pᵢ) = sⁿ + c₁sⁿ⁻¹ + … + cₙ.
func charPoly(ps []complex128) []float64 {
	c := []complex128{1}
	for _, p := range ps {
		next := make([]complex128, len(c)+1)
		for i, v := range c {
			next[i] += v
			next[i+1] -= v * p
		}
		c = next
	}
	out := make([]float64, len(ps))
	for i := range out {
		out[i] = real(c[i+1])
	}
	return out
}

// ackermann returns the 1×n gain k with eig(A − b·k) = ps:
// k = e_nᵀ·𝒞⁻¹·φ(A), 𝒞 = [b, Ab, …, Aⁿ⁻¹b], φ the desired characteristic
// polynomial.
func ackermann(a *mat.Dense, b mat.Vector, ps []complex128) (*mat.Dense, error) {
	n, _ := a.Dims()
	ctrb := mat.NewDense(n, n, nil)
	col := mat.VecDenseCopyOf(b)
	for j := 0; j < n; j++ {
		ctrb.SetCol(j, col.RawVector().Data)
		var next mat.VecDense
		next.MulVec(a, col)
		col = &next
	}
	en := mat.NewVecDense(n, nil)
	en.SetVec(n-1, 1)
	var w mat.VecDense
	if err := solveOK(w.SolveVec(ctrb.T(), en)); err != nil {
		return nil, fmt.Errorf("Ackermann's formula: the controllability matrix is singular: %w", err)
	}
	// φ(A) by Horner's rule.
	c := charPoly(ps)
	phi := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		phi.Set(i, i, 1)
	}
	for _, ci := range c {
		var next mat.Dense
		next.Mul(phi, a)
		for i := 0; i < n; i++ {
			next.Set(i, i, next.At(i, i)+ci)
		}
		phi = &next
	}
	k := mat.NewDense(1, n, nil)
	k.Mul(w.T(), phi)
	return k, nil
}

// solveOK accepts a finite Condition warning from gonum's solvers and passes
// on anything else.
func solveOK(err error) error {
	var c mat.Condition
	if errors.As(err, &c) && !math.IsInf(float64(c), 1) {
		return nil
	}
	return err
}

// placeSquare handles B of full row rank (rank n): the closed loop can be made
// any real matrix with the requested eigenvalues; the block-diagonal real
// form of the poles is used, so the eigenvectors are the unit vectors.
func placeSquare(a, br *mat.Dense, ps []complex128) (*mat.Dense, error) {
	n, _ := a.Dims()
	d := realBlockDiag(ps, n)
	var rhs, k mat.Dense
	rhs.Sub(a, d)
	if err := solveOK(k.Solve(br, &rhs)); err != nil {
		return nil, fmt.Errorf("B is singular: %w", err)
	}
	return &k, nil
}

func realBlockDiag(ps []complex128, n int) *mat.Dense {
	d := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		p := ps[i]
		d.Set(i, i, real(p))
		if imag(p) != 0 {
			d.Set(i, i+1, -imag(p))
			d.Set(i+1, i, imag(p))
			d.Set(i+1, i+1, real(p))
			i++
		}
	}
	return d
}

// heymann reduces a multi-input problem to a single-input one: with a
// preliminary feedback K₀ that makes A − B·K₀ cyclic and an input direction v
// with which (A − B·K₀, B·v) is controllable, K = K₀ + v·k where k comes from
// Ackermann's formula. K₀ = 0 with the unit input directions is tried first,
// then seeded random choices. check decides whether a candidate is accepted.
func heymann(a, b *mat.Dense, ps []complex128, check func(*mat.Dense) (*mat.Dense, error)) (*mat.Dense, error) {
	n, _ := a.Dims()
	_, m := b.Dims()
	rng := rand.New(rand.NewPCG(1985, 41)) // fixed seed: designs are reproducible
	scale := mat.Norm(a, 2) / math.Max(mat.Norm(b, 2), 1e-300)
	if scale == 0 {
		scale = 1
	}
	var lastErr error = errors.New("no single-input reduction found")
	const attempts = 24
	for t := 0; t < attempts; t++ {
		k0 := mat.NewDense(m, n, nil)
		v := mat.NewVecDense(m, nil)
		switch {
		case t < m:
			v.SetVec(t, 1)
		case t == m:
			for i := 0; i < m; i++ {
				v.SetVec(i, 1/math.Sqrt(float64(m)))
			}
		default:
			for i := 0; i < m; i++ {
				v.SetVec(i, rng.NormFloat64())
				for j := 0; j < n; j++ {
					k0.Set(i, j, scale*rng.NormFloat64())
				}
			}
		}
		var bk0, a1 mat.Dense
		bk0.Mul(b, k0)
		a1.Sub(a, &bk0)
		var bv mat.VecDense
		bv.MulVec(b, v)
		k1, err := ackermann(&a1, &bv, ps)
		if err != nil {
			lastErr = err
			continue
		}
		var k mat.Dense
		k.Mul(v, k1)
		k.Add(&k, k0)
		if _, err := check(&k); err != nil {
			lastErr = err
			continue
		}
		return &k, nil
	}
	return nil, fmt.Errorf("single-input reduction: %w", lastErr)
}
