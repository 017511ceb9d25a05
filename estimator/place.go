package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/cmplx"
	"sort"
	"strings"

	"gonum.org/v1/gonum/mat"
)

// poleTolerance is the relative accuracy a placed pole must reach; the rule
// for repeated poles is documented at Place.
const poleTolerance = 1e-6

// Place returns a state-feedback gain K (m×n) such that the eigenvalues of
// A − B·K are the requested poles. The poles must number n and be real or come
// in complex-conjugate pairs; (A, B) must be controllable, which is decided by
// CheckObservability on the dual pair (Aᵀ, Bᵀ).
//
// With one effective input (B of rank one) the gain is unique. For distinct
// poles it is computed from the closed-loop eigenvectors, which one input
// fixes (x_j spans null(U₁ᵀ(A − λ_jI)), see below), as that is better
// conditioned than Ackermann's formula; repeated poles, such as a deadbeat
// design, and any failure of that construction go to Ackermann's formula.
// With more inputs the gain is not unique; Place uses the robust method
// 0 of Kautsky, Nichols and Van Dooren (1985), carried out in complex
// arithmetic so that complex pairs are handled too, which chooses the
// closed-loop eigenvectors to be as well conditioned as it can. When a pole is
// repeated more often than B has rank, or that method fails, the problem is
// reduced to a single input (Heymann's lemma: a preliminary feedback and an
// input direction with which the pair is controllable) and solved by
// Ackermann's formula.
//
// Every design is checked: the eigenvalues of M = A − B·K are computed,
// matched one to one with the requested poles, and an error is returned when
// any misses. A pole p requested once must be met to within
// 1e-6·max(1, |p|). A pole requested k > 1 times is in general a defective
// eigenvalue whose computed members scatter by about (u·‖M‖_F)^(1/k), u the
// machine precision; each member must then lie within
// max(1e-6, 10·(u·max(1, ‖M‖_F))^(1/k))·max(1, |p|) of p, and the mean of
// the cluster, which rounding leaves accurate, within
// 1e-6·max(1, |p|)·max(1, ‖M‖_F)^(1/2).
func Place(a, b mat.Matrix, poles []complex128) (*mat.Dense, error) {
	n, nc := a.Dims()
	bn, m := b.Dims()
	if n != nc || bn != n {
		panic(fmt.Sprintf("estimator: Place with A %d×%d and B %d×%d", n, nc, bn, m))
	}
	if !allFiniteMatrix(a) || !allFiniteMatrix(b) {
		return nil, errors.New("place: A and B must be finite")
	}
	ps, err := normalisePoles(poles, n)
	if err != nil {
		return nil, fmt.Errorf("place: %w", err)
	}
	ad := mat.DenseCopyOf(a)
	bd := mat.DenseCopyOf(b)
	if o := CheckObservability(ad.T(), bd.T()); !o.Observable {
		return nil, fmt.Errorf("place: (A, B) is not controllable: %s", unseenModes(o, false))
	}

	// Compress B to full column rank: B = U·Σ·Vᵀ, B_r = U_r·Σ_r, K = V_r·K_r.
	var svd mat.SVD
	if !svd.Factorize(bd, mat.SVDThin) {
		return nil, errors.New("place: singular value decomposition of B failed")
	}
	sv := svd.Values(nil)
	rank := svd.Rank(float64(max(n, m)) * 2.220446049250313e-16)
	if rank == 0 || sv[0] == 0 {
		return nil, errors.New("place: B is zero")
	}
	var u, v mat.Dense
	svd.UTo(&u)
	svd.VTo(&v)
	br := mat.NewDense(n, rank, nil)
	for j := 0; j < rank; j++ {
		for i := 0; i < n; i++ {
			br.Set(i, j, u.At(i, j)*sv[j])
		}
	}
	vr := v.Slice(0, m, 0, rank)

	design := func(kr *mat.Dense) (*mat.Dense, error) {
		k := mat.NewDense(m, n, nil)
		k.Mul(vr, kr)
		var bk, cl mat.Dense
		bk.Mul(bd, k)
		cl.Sub(ad, &bk)
		if _, err := checkPoles(&cl, ps); err != nil {
			return nil, err
		}
		return k, nil
	}

	var firstErr error
	try := func(kr *mat.Dense, err error) *mat.Dense {
		if err == nil {
			var k *mat.Dense
			k, err = design(kr)
			if err == nil {
				return k
			}
		}
		if firstErr == nil {
			firstErr = err
		}
		return nil
	}

	switch {
	case rank == 1:
		// Distinct poles: the eigenvector construction (the closed-loop
		// eigenvectors are fixed by the poles when there is one input) is
		// better conditioned than Ackermann's formula; repeated poles need
		// Ackermann's formula, which is also the fallback.
		if maxMultiplicity(ps) == 1 {
			if k := try(knv(ad, br, ps)); k != nil {
				return k, nil
			}
		}
		if k := try(ackermann(ad, br.ColView(0), ps)); k != nil {
			return k, nil
		}
	case rank == n:
		if k := try(placeSquare(ad, br, ps)); k != nil {
			return k, nil
		}
	default:
		if maxMultiplicity(ps) <= rank {
			if k := try(knv(ad, br, ps)); k != nil {
				return k, nil
			}
		}
	}
	if rank > 1 {
		if k := try(heymann(ad, br, ps, design)); k != nil {
			return k, nil
		}
	}
	return nil, fmt.Errorf("place: %w", firstErr)
}

// PlaceObserver returns an observer gain L (n×p) such that the error dynamics
// of the given form (A − L·C for Prediction, A − L·C·A for Current) have the
// requested eigenvalues. It works by duality: the prediction gain is the
// transpose of the state-feedback gain for (Aᵀ, Cᵀ), the current gain that for
// (Aᵀ, (C·A)ᵀ). The achieved error-dynamics eigenvalues are checked as
// described at Place.
func PlaceObserver(a, c mat.Matrix, form Form, poles []complex128) (*mat.Dense, error) {
	n, nc := a.Dims()
	p, cn := c.Dims()
	if n != nc || cn != n {
		panic(fmt.Sprintf("estimator: PlaceObserver with A %d×%d and C %d×%d", n, nc, p, cn))
	}
	var out mat.Matrix
	var pair string
	switch form {
	case Prediction:
		out, pair = c, "(A, C)"
	case Current:
		var ca mat.Dense
		ca.Mul(c, a)
		out, pair = &ca, "(A, C·A)"
	default:
		panic(fmt.Sprintf("estimator: PlaceObserver for form %v, want prediction or current", form))
	}
	if !allFiniteMatrix(a) || !allFiniteMatrix(c) {
		return nil, errors.New("observer placement: A and C must be finite")
	}
	if o := CheckObservability(a, out); !o.Observable {
		return nil, fmt.Errorf("observer placement: %s is not observable: %s", pair, unseenModes(o, false))
	}
	k, err := Place(a.T(), out.T(), poles)
	if err != nil {
		return nil, fmt.Errorf("observer placement (%v form): %w", form, err)
	}
	l := mat.DenseCopyOf(k.T())
	ps, _ := normalisePoles(poles, n) // already validated by Place
	if _, err := checkPoles(ErrorDynamics(a, c, l, form), ps); err != nil {
		return nil, fmt.Errorf("observer placement (%v form): %w", form, err)
	}
	return l, nil
}

// normalisePoles checks that there are n finite poles, real or in conjugate
// pairs, and returns them with the real poles first and then each pair as
// (p, conj p) with Im p > 0 and the conjugate taken exactly.
func normalisePoles(poles []complex128, n int) ([]complex128, error) {
	if len(poles) != n {
		return nil, fmt.Errorf("%d poles requested for %d states", len(poles), n)
	}
	var real_, upper, lower []complex128
	for _, p := range poles {
		if cmplx.IsNaN(p) || cmplx.IsInf(p) {
			return nil, fmt.Errorf("pole %v is not finite", p)
		}
		switch {
		case imag(p) == 0:
			real_ = append(real_, p)
		case imag(p) > 0:
			upper = append(upper, p)
		default:
			lower = append(lower, p)
		}
	}
	used := make([]bool, len(lower))
	out := append([]complex128(nil), real_...)
	for _, p := range upper {
		found := false
		for i, q := range lower {
			if !used[i] && cmplx.Abs(q-cmplx.Conj(p)) <= 1e-12*math.Max(1, cmplx.Abs(p)) {
				used[i], found = true, true
				break
			}
		}
		if !found {
			return nil, fmt.Errorf("pole %v has no complex-conjugate partner", p)
		}
		out = append(out, p, cmplx.Conj(p))
	}
	for i, q := range lower {
		if !used[i] {
			return nil, fmt.Errorf("pole %v has no complex-conjugate partner", q)
		}
	}
	return out, nil
}

func maxMultiplicity(ps []complex128) int {
	best := 0
	for i, p := range ps {
		k := 0
		for _, q := range ps[i:] {
			if cmplx.Abs(p-q) <= poleTolerance*math.Max(1, cmplx.Abs(p)) {
				k++
			}
		}
		best = max(best, k)
	}
	return best
}

func formatPoles(ps []complex128) string {
	s := make([]string, len(ps))
	for i, p := range ps {
		if imag(p) == 0 {
			s[i] = fmt.Sprintf("%.6g", real(p))
		} else {
			s[i] = fmt.Sprintf("%.6g%+.6gi", real(p), imag(p))
		}
	}
	return strings.Join(s, ", ")
}

// checkPoles computes the eigenvalues of m and matches them with the wanted
// poles under the tolerances documented at Place. It returns the
// eigenvalues in Eigenvalues order.
func checkPoles(m *mat.Dense, want []complex128) ([]complex128, error) {
	got := Eigenvalues(m)
	if got == nil {
		return nil, errors.New("the closed-loop eigenvalues could not be computed")
	}
	if len(got) != len(want) {
		panic("estimator: checkPoles with mismatched sizes")
	}
	normM := math.Max(1, mat.Norm(m, 2))
	if math.IsNaN(normM) || math.IsInf(normM, 0) {
		return nil, errors.New("the closed-loop matrix is not finite")
	}
	// Cluster the wanted poles.
	type cluster struct {
		c complex128
		k int
	}
	var cl []cluster
	for _, w := range want {
		found := false
		for i := range cl {
			if cmplx.Abs(cl[i].c-w) <= poleTolerance*math.Max(1, cmplx.Abs(w)) {
				cl[i].k++
				found = true
				break
			}
		}
		if !found {
			cl = append(cl, cluster{c: w, k: 1})
		}
	}
	sort.SliceStable(cl, func(i, j int) bool { return cl[i].k < cl[j].k })
	used := make([]bool, len(got))
	const u = 2.220446049250313e-16
	for _, c := range cl {
		scale := math.Max(1, cmplx.Abs(c.c))
		tolMember := poleTolerance * scale
		tolMean := tolMember
		if c.k > 1 {
			tolMember = math.Max(poleTolerance, 10*math.Pow(u*normM, 1/float64(c.k))) * scale
			tolMean = poleTolerance * scale * math.Sqrt(normM)
		}
		var sum complex128
		for r := 0; r < c.k; r++ {
			best, bestD := -1, math.Inf(1)
			for i, g := range got {
				if !used[i] {
					if d := cmplx.Abs(g - c.c); d < bestD {
						best, bestD = i, d
					}
				}
			}
			used[best] = true
			if bestD > tolMember {
				return got, fmt.Errorf("requested pole %s (×%d) not achieved: nearest eigenvalue %s is %.3g away, tolerance %.3g; achieved %s",
					formatPoles([]complex128{c.c}), c.k, formatPoles([]complex128{got[best]}), bestD, tolMember, formatPoles(got))
			}
			sum += got[best]
		}
		if d := cmplx.Abs(sum/complex(float64(c.k), 0) - c.c); d > tolMean {
			return got, fmt.Errorf("requested pole %s (×%d) not achieved: the cluster's mean is %.3g away, tolerance %.3g; achieved %s",
				formatPoles([]complex128{c.c}), c.k, d, tolMean, formatPoles(got))
		}
	}
	return got, nil
}

// unseenModes describes why CheckObservability(a, c) finds the pair not
// observable: the modes the PBH test flags, or the rank of the observability
// matrix when no single mode is to blame. onlyUnstable keeps the modes with
// |λ| ≥ 1 (for a detectability message).
func unseenModes(o Observability, onlyUnstable bool) string {
	var modes []complex128
	for _, md := range o.Modes {
		if !md.Observable && (!onlyUnstable || !md.Stable) {
			modes = append(modes, md.Eigenvalue)
		}
	}
	switch {
	case o.Modes == nil:
		return "the eigenvalues of A could not be computed"
	case len(modes) > 0:
		return "mode(s) " + formatPoles(modes)
	default:
		return fmt.Sprintf("the observability matrix has rank %d of %d", o.Rank, o.N)
	}
}
