package estimator

import "math/bits"

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
