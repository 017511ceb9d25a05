package estimator

import (
	"fmt"
	"math"
	"math/cmplx"

	"gonum.org/v1/gonum/mat"
)

// WeakModeThreshold is the scaled PBH singular value below which an
// observable mode is reported as weak (Mode.Weak): the outputs see it, but so
// faintly that an observer gain for it is large and noise-sensitive. It is a
// judgement, not a theorem: 1e-6 is well above the rounding floor of the
// test (about n·1e-16) and well below the values of a plainly observable mode
// (of order 1e-3 to 1).
const WeakModeThreshold = 1e-6

// Observability is the result of CheckObservability for a pair (A, C) of a
// discrete-time model.
type Observability struct {
	// N is the number of states.
	N int
	// Rank is the numerical rank of the observability matrix
	// [C; C·A; …; C·A^{N−1}]: the number of its singular values above Tol.
	Rank int
	// Tol is the rank tolerance, max(rows, cols)·ε·σ_max of the
	// observability matrix, ε the machine epsilon (common practice: the
	// default of numpy.linalg.matrix_rank).
	Tol float64
	// SingularValues of the observability matrix, largest first (N values).
	SingularValues []float64
	// Modes holds one entry per distinct eigenvalue of A, as reported by the
	// Popov–Belevitch–Hautus (PBH) test.
	Modes []Mode
	// ModeTol is the base tolerance of the PBH test, 100·(N + p)·ε for p
	// outputs. A mode is unobservable when its scaled σ_min is at most
	// ModeTol·max(1, κ), κ the condition number of its eigenvalue (1 for a
	// cluster of repeated eigenvalues); see CheckObservability.
	ModeTol float64
	// Observable is true when the observability matrix has full rank and the
	// PBH test finds no unobservable mode. Away from the tolerances the two
	// tests agree; near them, the conservative answer is given.
	Observable bool
	// Detectable is true when every mode the PBH test finds unobservable is
	// stable (|λ| < 1), so that an observer can still make the estimation
	// error decay.
	Detectable bool
}

// Mode is one distinct eigenvalue λ of A and what the PBH test says of it.
//
// The test computes σ_min, the smallest singular value of the stacked matrix
// [λI − A; C], and scales it by ‖A‖₂ + |λ| + ‖C‖₂, an upper bound of the
// largest singular value of that matrix, so the scaled value lies in [0, 1]
// and reads as a reciprocal condition number: 0 when some eigenvector x of λ
// has C·x = 0 (the mode is unobservable), near 1 when the outputs see it
// plainly. The ‖C‖₂ term keeps the ratio defined when A = 0 and makes it
// insensitive to a change of output units once C dominates.
type Mode struct {
	// Eigenvalue is λ. Eigenvalues that agree to within the rounding error
	// of the eigenvalue solver (a repeated or defective eigenvalue) are
	// reported once, at the mean of the cluster.
	Eigenvalue complex128
	// SigmaMin is the scaled smallest singular value of [λI − A; C].
	SigmaMin float64
	// Observable is SigmaMin above the tolerance (Observability.ModeTol
	// times this eigenvalue's condition number).
	Observable bool
	// Weak is true for an observable mode with SigmaMin below
	// WeakModeThreshold.
	Weak bool
	// Stable is |λ| < 1 (A is the matrix of a discrete-time model).
	Stable bool
	// Direction is the magnitude of each state's component in the mode's
	// eigenvector, normalised to unit length, so a report can name the
	// states involved. For an unobservable or weak mode it is the eigenvector
	// the outputs see least (the right singular vector of σ_min, which for an
	// unobservable mode is an eigenvector x with C·x = 0); for a plainly
	// observable one, the eigenvector computed for λ (for a repeated λ, that
	// of one member of the cluster).
	Direction []float64
}

// ObservabilityMatrix returns [C; C·A; C·A²; …; C·A^{n−1}], (p·n)×n for an
// n×n A and a p×n C. It panics if the dimensions do not agree.
func ObservabilityMatrix(a, c mat.Matrix) *mat.Dense {
	n, p := checkAC("ObservabilityMatrix", a, c)
	o := mat.NewDense(p*n, n, nil)
	blk := mat.DenseCopyOf(c)
	for k := 0; k < n; k++ {
		o.Slice(k*p, (k+1)*p, 0, n).(*mat.Dense).Copy(blk)
		if k+1 < n {
			var next mat.Dense
			next.Mul(blk, a)
			blk = &next
		}
	}
	return o
}

// CurrentFormOutput returns C·A, the output matrix whose pair with A decides
// whether a current-form observer (error dynamics A − L·C·A) can place its
// poles: check it with CheckObservability(a, CurrentFormOutput(a, c)). For a
// zero-order-hold discretised A, which is invertible, (A, C·A) is observable
// exactly when (A, C) is; for a singular A it can lose the modes at λ = 0.
// It panics if the dimensions do not agree.
func CurrentFormOutput(a, c mat.Matrix) *mat.Dense {
	checkAC("CurrentFormOutput", a, c)
	var ca mat.Dense
	ca.Mul(c, a)
	return &ca
}

// CheckObservability tests the pair (A, C) of a discrete-time model in two
// ways: the rank of the observability matrix (by its singular values), and
// the PBH test on every distinct eigenvalue of A, which says which modes
// are unobservable or weak and which states they involve. It panics if A is
// not square or C does not have as many columns as A.
//
// The rank tolerance is that of numpy.linalg.matrix_rank (see
// Observability.Tol). Rounding in A itself (a discretised, transformed model
// is exact only to a few units in the last place) can lift the smallest
// singular value of a rank-deficient observability matrix above it, so the
// rank may come out one too high near the threshold; the PBH verdict per
// mode is the more reliable one and Observable requires both.
//
// The PBH tolerance for an eigenvalue is 100·(n + p)·ε·max(1, κ), where κ is
// the eigenvalue's condition number 1/|yᴴx| (x, y its unit right and left
// eigenvectors): a computed eigenvalue is off by about ε·‖A‖·κ, and the
// scaled σ_min of a truly unobservable mode is of that size. The factor 100
// covers the rounding of the model: over the 200 random ZOH-discretised
// systems of TestCurrentFormProperty, both forms, the largest scaled σ_min
// of an unobservable mode was 0.36·(n + p)·ε·κ and the smallest of an
// observable one 1.4e-4 (measured when this was written). Eigenvalues are
// clustered when they are closer than 100·n·ε·max(1, ‖A‖₂)·κ, the splitting
// rounding produces in a repeated or defective eigenvalue, capped at
// 1e-4·max(1, ‖A‖₂); a cluster is tested at its mean, which rounding leaves
// accurate even when each member is not, and at each member, keeping the
// smallest σ_min. If the eigenvalue solver fails to converge, Modes is nil
// and the pair is reported neither observable nor detectable.
func CheckObservability(a, c mat.Matrix) Observability {
	n, p := checkAC("CheckObservability", a, c)
	eps := math.Nextafter(1, 2) - 1
	res := Observability{N: n}

	o := ObservabilityMatrix(a, c)
	var svd mat.SVD
	if svd.Factorize(o, mat.SVDNone) {
		res.SingularValues = svd.Values(nil)
		rows, cols := o.Dims()
		res.Tol = float64(max(rows, cols)) * eps * res.SingularValues[0]
		for _, s := range res.SingularValues {
			if s > res.Tol {
				res.Rank++
			}
		}
	}

	normA := spectralNorm(a)
	normC := spectralNorm(c)
	res.ModeTol = 100 * float64(n+p) * eps
	modes, ok := pbhModes(a, c, normA, normC, res.ModeTol, eps)
	if !ok {
		return res
	}
	res.Modes = modes
	res.Observable = res.Rank == n
	res.Detectable = true
	for _, md := range modes {
		if !md.Observable {
			res.Observable = false
			if !md.Stable {
				res.Detectable = false
			}
		}
	}
	return res
}

// pbhModes runs the PBH test on each cluster of eigenvalues of A.
func pbhModes(a, c mat.Matrix, normA, normC, tol, eps float64) ([]Mode, bool) {
	n, _ := a.Dims()
	var eig mat.Eigen
	if !eig.Factorize(a, mat.EigenBoth) {
		return nil, false
	}
	vals := eig.Values(nil)
	var right, left mat.CDense
	eig.VectorsTo(&right)
	eig.LeftVectorsTo(&left)

	// Condition number of each eigenvalue, capped where yᴴx vanishes.
	kappa := make([]float64, n)
	for i := range vals {
		var dot complex128
		var nx, ny float64
		for k := 0; k < n; k++ {
			x, y := right.At(k, i), left.At(k, i)
			dot += cmplx.Conj(y) * x
			nx += real(x)*real(x) + imag(x)*imag(x)
			ny += real(y)*real(y) + imag(y)*imag(y)
		}
		kappa[i] = math.Sqrt(nx*ny) / cmplx.Abs(dot)
		if math.IsNaN(kappa[i]) || kappa[i] > 1/eps {
			kappa[i] = 1 / eps
		}
	}

	scaleA := math.Max(1, normA)
	maxSplit := 1e-4 * scaleA
	group := make([]int, n)
	for i := range group {
		group[i] = -1
	}
	var modes []Mode
	for i := range vals {
		if group[i] >= 0 {
			continue
		}
		members := []int{i}
		group[i] = i
		for j := i + 1; j < n; j++ {
			if group[j] >= 0 {
				continue
			}
			split := math.Min(100*float64(n)*eps*scaleA*math.Max(kappa[i], kappa[j]), maxSplit)
			if cmplx.Abs(vals[j]-vals[i]) <= split {
				members = append(members, j)
				group[j] = i
			}
		}

		var mean complex128
		k := 1.0
		for _, j := range members {
			mean += vals[j]
		}
		mean /= complex(float64(len(members)), 0)
		if len(members) == 1 {
			k = math.Max(1, kappa[i])
		}
		// A cluster of a real matrix that straddles the real axis has a
		// real mean; drop the rounding in its imaginary part.
		if math.Abs(imag(mean)) <= eps*scaleA {
			mean = complex(real(mean), 0)
		}

		cands := []complex128{mean}
		if len(members) > 1 {
			for _, j := range members {
				cands = append(cands, vals[j])
			}
		}
		best := Mode{SigmaMin: math.Inf(1)}
		for _, lam := range cands {
			s, dir := pbhSigmaMin(a, c, lam)
			s /= normA + cmplx.Abs(lam) + normC
			if s < best.SigmaMin {
				best.SigmaMin, best.Direction = s, dir
			}
		}
		if math.IsInf(best.SigmaMin, 1) || math.IsNaN(best.SigmaMin) {
			return nil, false
		}
		if best.SigmaMin >= WeakModeThreshold {
			best.Direction = eigenDirection(&right, i)
		}
		best.Eigenvalue = mean
		best.Observable = best.SigmaMin > tol*k
		best.Weak = best.Observable && best.SigmaMin < WeakModeThreshold
		best.Stable = cmplx.Abs(mean) < 1
		modes = append(modes, best)
	}
	return modes, true
}

// pbhSigmaMin returns the smallest singular value of [λI − A; C] and the
// magnitudes of its right singular vector, normalised to unit length. A
// complex λ is handled through the real matrix [[Re M, −Im M], [Im M, Re M]],
// whose singular values are those of M, each twice; a right singular vector
// [u; v] of it stands for u + i·v.
func pbhSigmaMin(a, c mat.Matrix, lam complex128) (float64, []float64) {
	n, _ := a.Dims()
	p, _ := c.Dims()
	cplx := imag(lam) != 0
	w := n
	if cplx {
		w = 2 * n
	}
	h := (n + p) * w / n
	m := mat.NewDense(h, w, nil)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			v := -a.At(i, j)
			if i == j {
				v += real(lam)
			}
			m.Set(i, j, v)
			if cplx {
				m.Set(n+p+i, n+j, v)
			}
		}
		if cplx {
			m.Set(i, n+i, -imag(lam))
			m.Set(n+p+i, i, imag(lam))
		}
	}
	for i := 0; i < p; i++ {
		for j := 0; j < n; j++ {
			m.Set(n+i, j, c.At(i, j))
			if cplx {
				m.Set(2*n+p+i, n+j, c.At(i, j))
			}
		}
	}
	var svd mat.SVD
	if !svd.Factorize(m, mat.SVDThinV) {
		return math.NaN(), nil
	}
	sv := svd.Values(nil)
	var v mat.Dense
	svd.VTo(&v)
	last := len(sv) - 1
	dir := make([]float64, n)
	var norm float64
	for j := 0; j < n; j++ {
		x := v.At(j, last)
		if cplx {
			x = math.Hypot(x, v.At(n+j, last))
		}
		dir[j] = math.Abs(x)
		norm += x * x
	}
	norm = math.Sqrt(norm)
	for j := range dir {
		dir[j] /= norm
	}
	return sv[last], dir
}

// eigenDirection returns the magnitudes of column j of vecs, normalised to
// unit length.
func eigenDirection(vecs *mat.CDense, j int) []float64 {
	n, _ := vecs.Dims()
	dir := make([]float64, n)
	var norm float64
	for k := range dir {
		dir[k] = cmplx.Abs(vecs.At(k, j))
		norm += dir[k] * dir[k]
	}
	norm = math.Sqrt(norm)
	for k := range dir {
		dir[k] /= norm
	}
	return dir
}

// spectralNorm returns the largest singular value of m (mat.Norm(m, 2) is
// the Frobenius norm).
func spectralNorm(m mat.Matrix) float64 {
	var svd mat.SVD
	if !svd.Factorize(m, mat.SVDNone) {
		return mat.Norm(m, 2) // an upper bound
	}
	return svd.Values(nil)[0]
}

// checkAC panics unless A is square and C has as many columns as A; it
// returns n and p.
func checkAC(fn string, a, c mat.Matrix) (n, p int) {
	n, nc := a.Dims()
	if n != nc {
		panic(fmt.Sprintf("estimator: %s: A is %d×%d, want a square matrix", fn, n, nc))
	}
	p, cn := c.Dims()
	if cn != n {
		panic(fmt.Sprintf("estimator: %s: C has %d columns, want %d (the size of A)", fn, cn, n))
	}
	return n, p
}
