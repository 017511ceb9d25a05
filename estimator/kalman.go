package estimator

import (
	"math"
	"math/bits"
)

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

// gateLive computes S = C_s·P⁻·C_sᵀ + R_s for the present outputs pat from
// the live covariance P⁻ and gates their innovation against it: while NIS
// exceeds the gate, the output with the largest r_i²/S_ii is dropped. It
// leaves the indices of the k present outputs in idx[:k], their rows of C
// and of C·P⁻ in cs and cp, S in sfull (k×k), and returns the accepted ones
// as ascending positions in idx, with the Cholesky factor of their S in chol,
// their innovations in rs, and their NIS. It records the outliers and the NIS
// before the gate in out; ok is false when nothing is left to correct with.
func (f *Filter) gateLive(pat Pattern, out *Outcome) (act []int, k int, nis float64, ok bool) {
	pr := f.pr
	n, p := f.n, f.p
	for s := pat; s != 0; s &= s - 1 {
		i := bits.TrailingZeros64(uint64(s))
		f.idx[k] = i
		copy(f.cs[k*n:k*n+n], pr.c[i*n:i*n+n])
		k++
	}
	if k == 0 {
		return nil, 0, 0, false
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
	act = f.act[:k]
	for l := range act {
		act[l] = l
	}
	for {
		ka := len(act)
		if ka == 0 {
			return nil, k, 0, false
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
			return nil, k, 0, false
		}
		rs := f.rs[:ka]
		for a, la := range act {
			rs[a] = f.r[idx[la]]
		}
		nis = flatForwardNorm(f.z[:ka], ch, nil, rs)
		if ka == k {
			out.GateNIS, out.GateDof = nis, k
		}
		if f.thr == nil || !(nis > f.thr[ka]) {
			return act, k, nis, true
		}
		if ka == k {
			out.GateNIS = math.Min(nis, f.thr[k])
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
}

// pattern returns the outputs at the positions act of idx.
func (f *Filter) pattern(act []int) Pattern {
	var s Pattern
	for _, la := range act {
		s |= Pattern(1) << uint(f.idx[la])
	}
	return s
}

// accept records the outputs act (positions in idx[:k], from gateLive) as
// used, with S_ii for InnovationVarTo, and moves their rows of C_s to the top
// of cs and their R_s to rr (act is ascending, so row a comes from row
// act[a] ≥ a).
func (f *Filter) accept(act []int, k int, nis float64, out *Outcome) {
	n, p := f.n, f.p
	ka := len(act)
	rr, cs, sf := f.rr[:ka*ka], f.cs, f.sfull[:k*k]
	for a, la := range act {
		i := f.idx[la]
		f.sv[i] = sf[la*k+la]
		if la != a {
			copy(cs[a*n:a*n+n], cs[la*n:la*n+n])
		}
		for b, lb := range act {
			rr[a*ka+b] = f.pr.r[i*p+f.idx[lb]]
		}
	}
	f.svOK = true
	out.Used, out.Corrected, out.HasNIS, out.NIS, out.Dof = f.pattern(act), true, true, nis, ka
}

// correctKalman gates and corrects with the time-varying Kalman gain.
func (f *Filter) correctKalman(pat Pattern, out *Outcome) {
	n := f.n
	act, k, nis, ok := f.gateLive(pat, out)
	if !ok {
		out.Used = 0
		return
	}
	f.accept(act, k, nis, out)
	ka := len(act)
	// Kᵀ = S⁻¹·C_s·P⁻: the active rows of C_s·P⁻, solved with the Cholesky
	// factor of S, forward and backward, row by row.
	ch := f.chol[:ka*ka]
	kt := f.kt[:ka*n]
	cp := f.cp
	for a, la := range act {
		copy(kt[a*n:a*n+n], cp[la*n:la*n+n])
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
	f.joseph(act)
}

// correctTracked gates against the live covariance and corrects with the
// fixed gain for the outputs accepted, propagating the covariance with the
// recursion of that gain (see Filter).
func (f *Filter) correctTracked(pat Pattern, out *Outcome) {
	pr := f.pr
	n := f.n
	act, k, nis, ok := f.gateLive(pat, out)
	if !ok {
		out.Used = 0
		return
	}
	g := pr.lookup(f.pattern(act))
	if g == nil {
		out.Used, out.NoGain = f.pattern(act), true
		return
	}
	f.accept(act, k, nis, out)
	ka := len(act)
	rs, l := f.rs[:ka], g.l
	if pr.form == Current {
		flatMulVecAdd(f.x, l, rs)
		kt := f.kt[:ka*n]
		for i := 0; i < n; i++ {
			for a := 0; a < ka; a++ {
				kt[a*n+i] = l[i*ka+a]
			}
		}
		f.joseph(act)
		return
	}
	flatMulVec(f.pend, l, rs)
	f.hasP = true
	// P⁻(k+1) = T·P⁻·Tᵀ + Q + L·R_s·Lᵀ, T = A − L·C_s.
	cs, t, rr := f.cs[:ka*n], f.tcl, f.rr[:ka*ka]
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			v := pr.a[i*n+j]
			for a := 0; a < ka; a++ {
				v -= l[i*ka+a] * cs[a*n+j]
			}
			t[i*n+j] = v
		}
	}
	nx := f.pnext
	flatMulNT(f.Pn, t, f.P, n, n, n, false)
	flatMulNT(nx, f.Pn, t, n, n, n, true)
	h := f.h[:ka]
	for i := 0; i < n; i++ {
		for b := range h {
			v := 0.0
			for a := 0; a < ka; a++ {
				v += l[i*ka+a] * rr[a*ka+b]
			}
			h[b] = v
		}
		for j := i; j < n; j++ {
			v := nx[i*n+j] + pr.q[i*n+j] + flatDot(h, l[j*ka:j*ka+ka])
			nx[i*n+j] = v
			nx[j*n+i] = v
		}
	}
	f.hasNext = true
}

// joseph sets P to (I − K·C_s)·P⁻·(I − K·C_s)ᵀ + K·R_s·Kᵀ for any gain K,
// given as Kᵀ in kt, with C_s and R_s of the accepted outputs compacted by
// accept and C_s·P⁻ in cp (rows at the positions act), a row i at a time
// into Pn:
//
//	M_i = P⁻_i − Σ_a K_ia·(C_s·P⁻)_a                (M = (I − K·C_s)·P⁻)
//	h_b = Σ_a K_ia·R_ab − M_i·C_sbᵀ                 (h = K·R_s − M·C_sᵀ)
//	row i of M·(I − K·C_s)ᵀ + K·R_s·Kᵀ = M_i + Σ_a h_a·Kᵀ_a,
//
// then symmetrised into P.
func (f *Filter) joseph(act []int) {
	n := f.n
	ka := len(act)
	kt, cp, cs, rr := f.kt[:ka*n], f.cp, f.cs, f.rr[:ka*ka]
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
