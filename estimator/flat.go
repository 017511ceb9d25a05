package estimator

import "math"

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
		dst[r] = flatDot(a[r*c:r*c+c], x)
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
		dst[r] += flatDot(a[r*c:r*c+c], x)
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
