package estimator

import (
	"math"
	"math/cmplx"
	"math/rand/v2"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

func TestObservabilityMatrix(t *testing.T) {
	tests := []struct {
		name string
		a, c *mat.Dense
		want *mat.Dense
	}{
		{
			// Sampled double integrator, position measured: O = [[1, 0], [1, T]]
			// (definition [C; CA], closed form).
			name: "double integrator",
			a:    mat.NewDense(2, 2, []float64{1, 0.1, 0, 1}),
			c:    mat.NewDense(1, 2, []float64{1, 0}),
			want: mat.NewDense(2, 2, []float64{1, 0, 1, 0.1}),
		},
		{
			// Two outputs, three states: blocks C, CA, CA² by hand.
			name: "two outputs",
			a:    mat.NewDense(3, 3, []float64{0, 1, 0, 0, 0, 1, 2, 0, 0}),
			c:    mat.NewDense(2, 3, []float64{1, 0, 0, 0, 0, 1}),
			want: mat.NewDense(6, 3, []float64{
				1, 0, 0,
				0, 0, 1,
				0, 1, 0, // C·A
				2, 0, 0,
				0, 0, 1, // C·A²
				0, 2, 0,
			}),
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := ObservabilityMatrix(tc.a, tc.c)
			if !mat.EqualApprox(got, tc.want, 1e-15) {
				t.Errorf("O = %v, want %v", mat.Formatted(got), mat.Formatted(tc.want))
			}
		})
	}
}

// wantMode is what a test expects of one mode; a nil pointer or slice is not
// checked.
type wantMode struct {
	eig        complex128
	observable bool
	weak       bool
	stable     bool
	sigma      *float64  // expected scaled σ_min of an observable mode
	dir        []float64 // expected Direction
}

func wantSigma(v float64) *float64 { return &v }

func TestCheckObservability(t *testing.T) {
	r2 := 1 / math.Sqrt2
	tests := []struct {
		name       string
		a, c       *mat.Dense
		rank       int
		observable bool
		detectable bool
		modes      []wantMode // in the order of the eigenvalues of A
	}{
		{
			// Two identical decoupled first-order modes seen through their sum
			// only: the difference x1 − x2 is invisible (SOURCES.md:
			// pbh-test, common practice). O = [[1, 1], [0.8, 0.8]], rank 1.
			name: "identical modes, sum measured, stable",
			a:    mat.NewDense(2, 2, []float64{0.8, 0, 0, 0.8}),
			c:    mat.NewDense(1, 2, []float64{1, 1}),
			rank: 1, observable: false, detectable: true,
			modes: []wantMode{{eig: 0.8, observable: false, stable: true, dir: []float64{r2, r2}}},
		},
		{
			name: "identical modes, sum measured, unstable",
			a:    mat.NewDense(2, 2, []float64{1.2, 0, 0, 1.2}),
			c:    mat.NewDense(1, 2, []float64{1, 1}),
			rank: 1, observable: false, detectable: false,
			modes: []wantMode{{eig: 1.2, observable: false, stable: false, dir: []float64{r2, r2}}},
		},
		{
			// Detectable but not observable: the unseen mode decays. The seen
			// mode's scaled σ_min: [λI − A; C] at λ = 1.1 is [[0, 0], [0, 0.6],
			// [1, 0]], σ_min = 0.6, over ‖A‖ + |λ| + ‖C‖ = 3.2 (closed form).
			name: "detectable, not observable",
			a:    mat.NewDense(2, 2, []float64{1.1, 0, 0, 0.5}),
			c:    mat.NewDense(1, 2, []float64{1, 0}),
			rank: 1, observable: false, detectable: true,
			modes: []wantMode{
				{eig: 1.1, observable: true, stable: false, sigma: wantSigma(0.6 / 3.2), dir: []float64{1, 0}},
				{eig: 0.5, observable: false, stable: true, dir: []float64{0, 1}},
			},
		},
		{
			name: "unstable mode unseen",
			a:    mat.NewDense(2, 2, []float64{1.1, 0, 0, 0.5}),
			c:    mat.NewDense(1, 2, []float64{0, 1}),
			rank: 1, observable: false, detectable: false,
			modes: []wantMode{
				{eig: 1.1, observable: false, stable: false, dir: []float64{1, 0}},
				{eig: 0.5, observable: true, stable: true, dir: []float64{0, 1}},
			},
		},
		{
			// Weakly observable: the second mode reaches the output with gain
			// 1e-8. σ_min of [[−0.4, 0], [0, 0], [1, 1e-8]] is
			// 3.71390676e-09 (numpy.linalg.svd), over 0.9 + 0.5 + 1 = 2.4
			// gives 1.5474611514754335e-09 (SOURCES.md: pbh-test, recomputed by
			// closedforms.py).
			name: "weakly observable",
			a:    mat.NewDense(2, 2, []float64{0.9, 0, 0, 0.5}),
			c:    mat.NewDense(1, 2, []float64{1, 1e-8}),
			rank: 2, observable: true, detectable: true,
			modes: []wantMode{
				{eig: 0.9, observable: true, stable: true, dir: []float64{1, 0}},
				{eig: 0.5, observable: true, weak: true, stable: true, sigma: wantSigma(1.5474611514754335e-09), dir: []float64{0, 1}},
			},
		},
		{
			// Jordan block measured at the end of the chain: observable,
			// O = [[1, 0], [0.5, 1]] (closed form); one mode listed.
			name: "Jordan block, observable",
			a:    mat.NewDense(2, 2, []float64{0.5, 1, 0, 0.5}),
			c:    mat.NewDense(1, 2, []float64{1, 0}),
			rank: 2, observable: true, detectable: true,
			modes: []wantMode{{eig: 0.5, observable: true, stable: true}},
		},
		{
			// The same block measured at its start: the eigenvector e1 is
			// unseen (C·e1 = 0), O = [[0, 1], [0, 0.5]].
			name: "Jordan block, start measured",
			a:    mat.NewDense(2, 2, []float64{0.5, 1, 0, 0.5}),
			c:    mat.NewDense(1, 2, []float64{0, 1}),
			rank: 1, observable: false, detectable: true,
			modes: []wantMode{{eig: 0.5, observable: false, stable: true, dir: []float64{1, 0}}},
		},
		{
			// A 3×3 Jordan block seen in the middle: O = [[0, 1, 0],
			// [0, 0.7, 1], [0, 0.49, 1.4]], rank 2; the eigenvector e1 unseen.
			name: "Jordan block of three, middle measured",
			a:    mat.NewDense(3, 3, []float64{0.7, 1, 0, 0, 0.7, 1, 0, 0, 0.7}),
			c:    mat.NewDense(1, 3, []float64{0, 1, 0}),
			rank: 2, observable: false, detectable: true,
			modes: []wantMode{{eig: 0.7, observable: false, stable: true, dir: []float64{1, 0, 0}}},
		},
		{
			// The Jordan block above turned by the orthogonal Q = [[0.6, −0.8],
			// [0.8, 0.6]] (A → QAQᵀ, C → CQᵀ): rounding now splits the double
			// eigenvalue, which must still be reported once, unobservable
			// along Q·e1 = (0.6, 0.8).
			name: "Jordan block, start measured, rotatedBy",
			a: rotatedBy(mat.NewDense(2, 2, []float64{0.6, -0.8, 0.8, 0.6}),
				mat.NewDense(2, 2, []float64{0.5, 1, 0, 0.5})),
			c:    mat.NewDense(1, 2, []float64{-0.8, 0.6}), // [0, 1]·Qᵀ
			rank: 1, observable: false, detectable: true,
			modes: []wantMode{{eig: 0.5, observable: false, stable: true, dir: []float64{0.6, 0.8}}},
		},
		{
			// The block of three turned by the orthogonal, symmetric
			// Q = [[1, 2, 2], [2, 1, −2], [2, −2, 1]]/3; C = [0, 1, 0]·Qᵀ,
			// unobservable along Q·e1 = (1, 2, 2)/3.
			name: "Jordan block of three, middle measured, rotatedBy",
			a: rotatedBy(mat.NewDense(3, 3, []float64{1. / 3, 2. / 3, 2. / 3, 2. / 3, 1. / 3, -2. / 3, 2. / 3, -2. / 3, 1. / 3}),
				mat.NewDense(3, 3, []float64{0.7, 1, 0, 0, 0.7, 1, 0, 0, 0.7})),
			c:    mat.NewDense(1, 3, []float64{2. / 3, 1. / 3, -2. / 3}),
			rank: 2, observable: false, detectable: true,
			modes: []wantMode{{eig: 0.7, observable: false, stable: true, dir: []float64{1. / 3, 2. / 3, 2. / 3}}},
		},
		{
			// An oscillation (0.8 ± 0.3j) the output does not see, and a
			// seen first-order mode: the unobservable eigenvectors are
			// (1, ∓j, 0)/√2.
			name: "unseen oscillation",
			a:    mat.NewDense(3, 3, []float64{0.8, -0.3, 0, 0.3, 0.8, 0, 0, 0, 0.5}),
			c:    mat.NewDense(1, 3, []float64{0, 0, 1}),
			rank: 1, observable: false, detectable: true,
			modes: []wantMode{
				{eig: 0.8 + 0.3i, observable: false, stable: true, dir: []float64{r2, r2, 0}},
				{eig: 0.8 - 0.3i, observable: false, stable: true, dir: []float64{r2, r2, 0}},
				{eig: 0.5, observable: true, stable: true, dir: []float64{0, 0, 1}},
			},
		},
		{
			name: "scalar, not measured",
			a:    mat.NewDense(1, 1, []float64{0.5}),
			c:    mat.NewDense(1, 1, []float64{0}),
			rank: 0, observable: false, detectable: true,
			modes: []wantMode{{eig: 0.5, observable: false, stable: true, dir: []float64{1}}},
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := CheckObservability(tc.a, tc.c)
			n, _ := tc.a.Dims()
			if got.N != n || got.Rank != tc.rank || got.Observable != tc.observable || got.Detectable != tc.detectable {
				t.Errorf("N, Rank, Observable, Detectable = %d, %d, %v, %v; want %d, %d, %v, %v (σ %v)",
					got.N, got.Rank, got.Observable, got.Detectable, n, tc.rank, tc.observable, tc.detectable, got.SingularValues)
			}
			if len(got.SingularValues) != n {
				t.Errorf("%d singular values, want %d", len(got.SingularValues), n)
			}
			if len(got.Modes) != len(tc.modes) {
				t.Fatalf("modes %+v, want %d", got.Modes, len(tc.modes))
			}
			for _, w := range tc.modes {
				m := modeAt(got.Modes, w.eig)
				if m == nil {
					t.Errorf("no mode at %v in %+v", w.eig, got.Modes)
					continue
				}
				if m.Observable != w.observable || m.Weak != w.weak || m.Stable != w.stable {
					t.Errorf("mode %v: Observable, Weak, Stable = %v, %v, %v; want %v, %v, %v (σ %.3g)",
						w.eig, m.Observable, m.Weak, m.Stable, w.observable, w.weak, w.stable, m.SigmaMin)
				}
				if !w.observable && m.SigmaMin > got.ModeTol {
					t.Errorf("mode %v: SigmaMin %.3g above the tolerance %.3g", w.eig, m.SigmaMin, got.ModeTol)
				}
				if w.sigma != nil && math.Abs(m.SigmaMin-*w.sigma) > 1e-9**w.sigma {
					t.Errorf("mode %v: SigmaMin %.17g, want %.17g", w.eig, m.SigmaMin, *w.sigma)
				}
				if w.dir != nil && !directionNear(m.Direction, w.dir, 1e-7) {
					t.Errorf("mode %v: Direction %v, want %v", w.eig, m.Direction, w.dir)
				}
			}
		})
	}
}

// rotatedBy returns Q·A·Qᵀ.
func rotatedBy(q, a *mat.Dense) *mat.Dense {
	var tmp, out mat.Dense
	tmp.Mul(q, a)
	out.Mul(&tmp, q.T())
	return &out
}

func modeAt(modes []Mode, eig complex128) *Mode {
	for i := range modes {
		if cmplx.Abs(modes[i].Eigenvalue-eig) < 1e-9 {
			return &modes[i]
		}
	}
	return nil
}

func directionNear(got, want []float64, tol float64) bool {
	if len(got) != len(want) {
		return false
	}
	for i := range want {
		if math.Abs(got[i]-want[i]) > tol {
			return false
		}
	}
	return true
}

// TestCurrentFormSingularA: when A is singular, (A, C) can be observable and
// (A, C·A) not. Here x1(k+1) = x2(k) is a pure delay of x2 and C measures
// x1: O(A, C) = I, but C·A = [0, 1] never sees x1(k) itself, and
// O(A, C·A) = [[0, 1], [0, 0.5]] has rank 1 (closed forms). The lost mode is
// λ = 0, which is stable, so the current form is still detectable.
func TestCurrentFormSingularA(t *testing.T) {
	a := mat.NewDense(2, 2, []float64{0, 1, 0, 0.5})
	c := mat.NewDense(1, 2, []float64{1, 0})

	ca := CurrentFormOutput(a, c)
	if want := mat.NewDense(1, 2, []float64{0, 1}); !mat.Equal(ca, want) {
		t.Fatalf("C·A = %v, want %v", mat.Formatted(ca), mat.Formatted(want))
	}
	pred := CheckObservability(a, c)
	if !pred.Observable || pred.Rank != 2 {
		t.Errorf("(A, C): Observable %v, Rank %d; want true, 2", pred.Observable, pred.Rank)
	}
	cur := CheckObservability(a, ca)
	if cur.Observable || cur.Rank != 1 || !cur.Detectable {
		t.Errorf("(A, CA): Observable %v, Rank %d, Detectable %v; want false, 1, true", cur.Observable, cur.Rank, cur.Detectable)
	}
	m := modeAt(cur.Modes, 0)
	if m == nil || m.Observable || !directionNear(m.Direction, []float64{1, 0}, 1e-12) {
		t.Errorf("(A, CA): mode at 0 is %+v, want unobservable along x1", m)
	}
	if m := modeAt(cur.Modes, 0.5); m == nil || !m.Observable {
		t.Errorf("(A, CA): mode at 0.5 is %+v, want observable", m)
	}
}

// TestCurrentFormProperty checks a trade fact (SOURCES.md: zoh-eigenvalues,
// common practice): a ZOH-discretised A = e^{A_c·T} is invertible, so (A, C·A) is
// observable exactly when (A, C) is. Half the systems are random (observable
// with probability one); the other half are built unobservable on purpose —
// a continuous A_c, C in the block form [[A11, 0], [A21, A22]], [C1, 0],
// rotatedBy by a random orthogonal matrix — and their unobservable modes must
// be exactly e^{λ·T} for the eigenvalues λ of A22, in both forms.
func TestCurrentFormProperty(t *testing.T) {
	rng := rand.New(rand.NewPCG(20240601, 7))
	for it := 0; it < 200; it++ {
		n := 2 + rng.IntN(5)
		p := 1 + rng.IntN(2)
		unobs := it%2 == 1
		k := n // number of observable states in the block form
		if unobs {
			k = 1 + rng.IntN(n-1)
		}
		ac := mat.NewDense(n, n, nil)
		for i := 0; i < n; i++ {
			for j := 0; j < n; j++ {
				if i < k && j >= k {
					continue // A12 = 0
				}
				ac.Set(i, j, rng.NormFloat64())
			}
		}
		c := mat.NewDense(p, n, nil)
		for i := 0; i < p; i++ {
			for j := 0; j < k; j++ {
				c.Set(i, j, rng.NormFloat64())
			}
		}
		ts := 0.05 + 0.5*rng.Float64()

		var want []complex128 // e^{λT} for λ in eig(A22)
		if unobs {
			var eig mat.Eigen
			if !eig.Factorize(ac.Slice(k, n, k, n), mat.EigenNone) {
				t.Fatalf("system %d: eigenvalues of A22 failed", it)
			}
			for _, l := range eig.Values(nil) {
				want = append(want, cmplx.Exp(l*complex(ts, 0)))
			}
		}

		q := observeRandomOrthogonal(rng, n)
		var tmp, acq, cq mat.Dense
		tmp.Mul(q, ac)
		acq.Mul(&tmp, q.T())
		cq.Mul(c, q.T())
		ad, _, _ := Discretise(&acq, nil, nil, ts)

		for _, form := range []struct {
			name string
			c    mat.Matrix
		}{{"(A, C)", &cq}, {"(A, CA)", CurrentFormOutput(ad, &cq)}} {
			got := CheckObservability(ad, form.c)
			if got.Observable == unobs {
				t.Errorf("system %d (n=%d p=%d k=%d) %s: Observable %v, want %v; σ %v, modes %+v",
					it, n, p, k, form.name, got.Observable, !unobs, got.SingularValues, got.Modes)
				continue
			}
			if !unobs {
				if got.Rank != n {
					t.Errorf("system %d %s: Rank %d, want %d (σ %v)", it, form.name, got.Rank, n, got.SingularValues)
				}
				continue
			}
			if got.Rank == n && got.SingularValues[n-1] > 1e3*got.Tol {
				t.Errorf("system %d %s: smallest σ %.3g far above the tolerance %.3g", it, form.name, got.SingularValues[n-1], got.Tol)
			}
			// Every unobservable mode is an eigenvalue of the unseen block,
			// and every eigenvalue of the unseen block is unobservable.
			for _, m := range got.Modes {
				if !m.Observable && !eigenvalueIn(want, m.Eigenvalue, 1e-8) {
					t.Errorf("system %d %s: unobservable mode %v not in e^{eig(A22)·T} = %v", it, form.name, m.Eigenvalue, want)
				}
			}
			for _, w := range want {
				m := modeNearest(got.Modes, w)
				if m == nil || m.Observable || cmplx.Abs(m.Eigenvalue-w) > 1e-6 {
					t.Errorf("system %d %s: e^{λT} = %v should be an unobservable mode; modes %+v", it, form.name, w, got.Modes)
				}
			}
		}
	}
}

func observeRandomOrthogonal(rng *rand.Rand, n int) *mat.Dense {
	g := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			g.Set(i, j, rng.NormFloat64())
		}
	}
	var qr mat.QR
	qr.Factorize(g)
	var q mat.Dense
	qr.QTo(&q)
	return &q
}

func eigenvalueIn(vals []complex128, v complex128, tol float64) bool {
	for _, w := range vals {
		if cmplx.Abs(w-v) <= tol {
			return true
		}
	}
	return false
}

func modeNearest(modes []Mode, v complex128) *Mode {
	var best *Mode
	for i := range modes {
		if best == nil || cmplx.Abs(modes[i].Eigenvalue-v) < cmplx.Abs(best.Eigenvalue-v) {
			best = &modes[i]
		}
	}
	return best
}

func TestObservePanics(t *testing.T) {
	sq := mat.NewDense(2, 2, nil)
	tests := []struct {
		name string
		fn   func()
	}{
		{"ObservabilityMatrix A not square", func() { ObservabilityMatrix(mat.NewDense(2, 3, nil), mat.NewDense(1, 3, nil)) }},
		{"ObservabilityMatrix C columns", func() { ObservabilityMatrix(sq, mat.NewDense(1, 3, nil)) }},
		{"CheckObservability A not square", func() { CheckObservability(mat.NewDense(3, 2, nil), mat.NewDense(1, 2, nil)) }},
		{"CheckObservability C columns", func() { CheckObservability(sq, mat.NewDense(2, 1, nil)) }},
		{"CurrentFormOutput C columns", func() { CurrentFormOutput(sq, mat.NewDense(1, 1, nil)) }},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			defer func() {
				r := recover()
				if s, ok := r.(string); !ok || !strings.HasPrefix(s, "estimator: ") {
					t.Errorf("panic %v, want an estimator message", r)
				}
			}()
			tc.fn()
		})
	}
}
