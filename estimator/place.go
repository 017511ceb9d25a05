package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/cmplx"
	"math/rand/v2"
	"sort"
	"strings"

	"gonum.org/v1/gonum/mat"
)

// poleTolerance is the relative accuracy a placed pole must reach; the rule
// for repeated poles is documented at Place.
const poleTolerance = 1e-6

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
