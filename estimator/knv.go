package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/cmplx"

	"gonum.org/v1/gonum/mat"
)

// cmat is a small dense complex matrix, row-major, for the robust placement.
type cmat struct {
	r, c int
	d    []complex128
}

func newCmat(r, c int) *cmat { return &cmat{r: r, c: c, d: make([]complex128, r*c)} }

func (m *cmat) at(i, j int) complex128     { return m.d[i*m.c+j] }
func (m *cmat) set(i, j int, v complex128) { m.d[i*m.c+j] = v }

// householderQ returns the full unitary factor Q (r×r) of the QR factorisation
// of m and the moduli of the diagonal of R.
func householderQ(m *cmat) (*cmat, []float64) {
	a := &cmat{r: m.r, c: m.c, d: append([]complex128(nil), m.d...)}
	q := newCmat(m.r, m.r)
	for i := 0; i < m.r; i++ {
		q.set(i, i, 1)
	}
	steps := min(m.r, m.c)
	rdiag := make([]float64, steps)
	v := make([]complex128, m.r)
	for k := 0; k < steps; k++ {
		var norm float64
		for i := k; i < m.r; i++ {
			norm = math.Hypot(norm, cmplx.Abs(a.at(i, k)))
		}
		rdiag[k] = norm
		if norm == 0 {
			continue
		}
		x0 := a.at(k, k)
		phase := complex(1, 0)
		if x0 != 0 {
			phase = x0 / complex(cmplx.Abs(x0), 0)
		}
		alpha := -phase * complex(norm, 0)
		var vnorm float64
		for i := k; i < m.r; i++ {
			v[i] = a.at(i, k)
			if i == k {
				v[i] -= alpha
			}
			vnorm = math.Hypot(vnorm, cmplx.Abs(v[i]))
		}
		if vnorm == 0 {
			continue
		}
		for i := k; i < m.r; i++ {
			v[i] /= complex(vnorm, 0)
		}
		// A ← (I − 2vvᴴ)A on rows k.., columns k..
		for j := k; j < m.c; j++ {
			var s complex128
			for i := k; i < m.r; i++ {
				s += cmplx.Conj(v[i]) * a.at(i, j)
			}
			for i := k; i < m.r; i++ {
				a.set(i, j, a.at(i, j)-2*v[i]*s)
			}
		}
		// Q ← Q(I − 2vvᴴ)
		for i := 0; i < m.r; i++ {
			var s complex128
			for j := k; j < m.r; j++ {
				s += q.at(i, j) * v[j]
			}
			for j := k; j < m.r; j++ {
				q.set(i, j, q.at(i, j)-2*s*cmplx.Conj(v[j]))
			}
		}
	}
	return q, rdiag
}

// csolve solves a·x = b for complex square a by Gaussian elimination with
// partial pivoting; it reports false when a is singular to working precision.
func csolve(a, b *cmat) (*cmat, bool) {
	n := a.r
	lu := &cmat{r: n, c: n, d: append([]complex128(nil), a.d...)}
	x := &cmat{r: b.r, c: b.c, d: append([]complex128(nil), b.d...)}
	var anorm float64
	for _, v := range a.d {
		anorm = math.Max(anorm, cmplx.Abs(v))
	}
	for k := 0; k < n; k++ {
		piv, best := k, cmplx.Abs(lu.at(k, k))
		for i := k + 1; i < n; i++ {
			if v := cmplx.Abs(lu.at(i, k)); v > best {
				piv, best = i, v
			}
		}
		if best <= 1e-14*anorm || best == 0 {
			return nil, false
		}
		if piv != k {
			for j := 0; j < n; j++ {
				t := lu.at(k, j)
				lu.set(k, j, lu.at(piv, j))
				lu.set(piv, j, t)
			}
			for j := 0; j < x.c; j++ {
				t := x.at(k, j)
				x.set(k, j, x.at(piv, j))
				x.set(piv, j, t)
			}
		}
		for i := k + 1; i < n; i++ {
			f := lu.at(i, k) / lu.at(k, k)
			if f == 0 {
				continue
			}
			for j := k; j < n; j++ {
				lu.set(i, j, lu.at(i, j)-f*lu.at(k, j))
			}
			for j := 0; j < x.c; j++ {
				x.set(i, j, x.at(i, j)-f*x.at(k, j))
			}
		}
	}
	for k := n - 1; k >= 0; k-- {
		for j := 0; j < x.c; j++ {
			s := x.at(k, j)
			for i := k + 1; i < n; i++ {
				s -= lu.at(k, i) * x.at(i, j)
			}
			x.set(k, j, s/lu.at(k, k))
		}
	}
	return x, true
}

// knv is method 0 of Kautsky, Nichols and Van Dooren for B (n×m) of full
// column rank m < n (for m = 1 each Sⱼ is one direction and no sweep is run). The closed-loop eigenvector of pole λⱼ is chosen in
// Sⱼ = null(U₁ᵀ(A − λⱼI)), where B = [U₀ U₁]·[Z; 0]; each sweep replaces one
// vector at a time by the projection onto Sⱼ of the direction orthogonal to
// all the others, which increases |det X| for unit columns. Complex poles are
// handled in complex arithmetic with the eigenvector of the conjugate pole
// kept equal to the conjugate vector. Then M = X·Λ·X⁻¹ and K = Z⁻¹U₀ᵀ(A − M).
func knv(a, b *mat.Dense, ps []complex128) (*mat.Dense, error) {
	n, _ := a.Dims()
	_, m := b.Dims()
	var qr mat.QR
	qr.Factorize(b)
	var q, r mat.Dense
	qr.QTo(&q)
	qr.RTo(&r)

	// Sⱼ for each pole (n×m, orthonormal columns).
	s := make([]*cmat, n)
	for j := 0; j < n; j++ {
		if j > 0 && imag(ps[j]) < 0 {
			s[j] = conjCmat(s[j-1])
			continue
		}
		// Nᴴ = ((U₁ᵀ(A − λI)))ᴴ = (A − λI)ᴴ·U₁, n×(n−m).
		nh := newCmat(n, n-m)
		for i := 0; i < n; i++ {
			for k := 0; k < n-m; k++ {
				var sum complex128
				for l := 0; l < n; l++ {
					al := complex(a.At(l, i), 0)
					if l == i {
						al -= ps[j]
					}
					sum += cmplx.Conj(al) * complex(q.At(l, m+k), 0)
				}
				nh.set(i, k, sum)
			}
		}
		qq, _ := householderQ(nh)
		sj := newCmat(n, m)
		for i := 0; i < n; i++ {
			for k := 0; k < m; k++ {
				sj.set(i, k, qq.at(i, n-m+k))
			}
		}
		s[j] = sj
	}

	// Initial vectors: the normalised sum of each basis.
	x := newCmat(n, n)
	for j := 0; j < n; j++ {
		if j > 0 && imag(ps[j]) < 0 {
			for i := 0; i < n; i++ {
				x.set(i, j, cmplx.Conj(x.at(i, j-1)))
			}
			continue
		}
		col := make([]complex128, n)
		for i := 0; i < n; i++ {
			for k := 0; k < m; k++ {
				col[i] += s[j].at(i, k)
			}
		}
		setUnitCol(x, j, col)
	}

	detX := func() float64 {
		_, rd := householderQ(x)
		d := 1.0
		for _, v := range rd {
			d *= v
		}
		return d
	}
	prev := detX()
	maxSweeps := 30
	if m == 1 {
		maxSweeps = 0 // each Sⱼ is a single direction: nothing to choose
	}
	const rtol = 1e-3
	others := newCmat(n, n-1)
	for sweep := 0; sweep < maxSweeps; sweep++ {
		for j := 0; j < n; j++ {
			if j > 0 && imag(ps[j]) < 0 {
				continue
			}
			for i := 0; i < n; i++ {
				c := 0
				for k := 0; k < n; k++ {
					if k != j {
						others.set(i, c, x.at(i, k))
						c++
					}
				}
			}
			qq, _ := householderQ(others)
			// y = Sⱼ·Sⱼᴴ·q with q the last column of Q.
			coef := make([]complex128, m)
			for k := 0; k < m; k++ {
				for i := 0; i < n; i++ {
					coef[k] += cmplx.Conj(s[j].at(i, k)) * qq.at(i, n-1)
				}
			}
			y := make([]complex128, n)
			var ny float64
			for i := 0; i < n; i++ {
				for k := 0; k < m; k++ {
					y[i] += s[j].at(i, k) * coef[k]
				}
				ny = math.Hypot(ny, cmplx.Abs(y[i]))
			}
			if ny < 1e-8 {
				continue // q is almost orthogonal to Sⱼ: keep the current vector
			}
			setUnitCol(x, j, y)
			if imag(ps[j]) > 0 {
				for i := 0; i < n; i++ {
					x.set(i, j+1, cmplx.Conj(x.at(i, j)))
				}
			}
		}
		d := detX()
		if prev > 0 && math.Abs(d-prev)/prev < rtol {
			break
		}
		prev = d
	}

	// Mᵀ = X⁻ᵀ·(XΛ)ᵀ: solve Xᵀ·Y = (XΛ)ᵀ.
	xt := newCmat(n, n)
	xlt := newCmat(n, n)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			xt.set(j, i, x.at(i, j))
			xlt.set(j, i, x.at(i, j)*ps[j])
		}
	}
	mt, ok := csolve(xt, xlt)
	if !ok {
		return nil, errors.New("robust placement: the eigenvector matrix is singular")
	}
	// K = Z⁻¹·U₀ᵀ·(A − M), real part.
	rhs := mat.NewDense(m, n, nil)
	for i := 0; i < m; i++ {
		for j := 0; j < n; j++ {
			var sum float64
			for l := 0; l < n; l++ {
				sum += q.At(l, i) * (a.At(l, j) - real(mt.at(j, l)))
			}
			rhs.Set(i, j, sum)
		}
	}
	z := r.Slice(0, m, 0, m)
	var k mat.Dense
	if err := solveOK(k.Solve(z, rhs)); err != nil {
		return nil, fmt.Errorf("robust placement: %w", err)
	}
	return &k, nil
}

func conjCmat(m *cmat) *cmat {
	out := newCmat(m.r, m.c)
	for i, v := range m.d {
		out.d[i] = cmplx.Conj(v)
	}
	return out
}

func setUnitCol(x *cmat, j int, col []complex128) {
	var norm float64
	for _, v := range col {
		norm = math.Hypot(norm, cmplx.Abs(v))
	}
	for i, v := range col {
		x.set(i, j, v/complex(norm, 0))
	}
}

func allFiniteMatrix(m mat.Matrix) bool {
	r, c := m.Dims()
	for i := 0; i < r; i++ {
		for j := 0; j < c; j++ {
			if v := m.At(i, j); math.IsNaN(v) || math.IsInf(v, 0) {
				return false
			}
		}
	}
	return true
}
