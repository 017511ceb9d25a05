package estimator

import (
	"encoding/json"
	"fmt"
	"math"
	"math/cmplx"
	"os"
	"path/filepath"
	"sort"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// discretiseMaxDiff returns the largest entry of |got − want|.
func discretiseMaxDiff(got, want mat.Matrix) float64 {
	r, c := want.Dims()
	gr, gc := got.Dims()
	if r != gr || c != gc {
		return math.Inf(1)
	}
	d := 0.0
	for i := 0; i < r; i++ {
		for j := 0; j < c; j++ {
			d = math.Max(d, math.Abs(got.At(i, j)-want.At(i, j)))
		}
	}
	return d
}

func TestDiscretiseClosedForms(t *testing.T) {
	tests := []struct {
		name   string
		a, b   *mat.Dense
		qc     *mat.SymDense
		ts     float64
		ad, bd *mat.Dense
		qd     *mat.SymDense // nil: not checked
		tol    float64
	}{
		{
			// Double integrator: Φ = [[1, T], [0, 1]], Γ = [T²/2; T],
			// Q_d = q·[[T³/3, T²/2], [T²/2, T]] (SOURCES.md: double-integrator).
			name: "double integrator T=0.1 q=2",
			a:    mat.NewDense(2, 2, []float64{0, 1, 0, 0}),
			b:    mat.NewDense(2, 1, []float64{0, 1}),
			qc:   mat.NewSymDense(2, []float64{0, 0, 0, 2}),
			ts:   0.1,
			ad:   mat.NewDense(2, 2, []float64{1, 0.1, 0, 1}),
			bd:   mat.NewDense(2, 1, []float64{0.1 * 0.1 / 2, 0.1}),
			qd:   mat.NewSymDense(2, []float64{2 * 0.001 / 3, 2 * 0.01 / 2, 2 * 0.01 / 2, 2 * 0.1}),
			tol:  1e-15,
		},
		{
			// Same closed forms, a long sample that needs the Van Loan
			// interval halved (‖A‖₁·T = 7).
			name: "double integrator T=7 q=0.5",
			a:    mat.NewDense(2, 2, []float64{0, 1, 0, 0}),
			b:    mat.NewDense(2, 1, []float64{0, 1}),
			qc:   mat.NewSymDense(2, []float64{0, 0, 0, 0.5}),
			ts:   7,
			ad:   mat.NewDense(2, 2, []float64{1, 7, 0, 1}),
			bd:   mat.NewDense(2, 1, []float64{49.0 / 2, 7}),
			qd:   mat.NewSymDense(2, []float64{0.5 * 343 / 3, 0.5 * 49 / 2, 0.5 * 49 / 2, 0.5 * 7}),
			tol:  1e-12,
		},
		{
			// First-order lag τẋ = −x + K·u + w, τ=2, K=3, T=0.5, unit spectral
			// density: Φ = e^{−T/τ}, Γ = K(1 − e^{−T/τ}), Q_d = (τ/2)(1 − e^{−2T/τ}).
			// SOURCES.md: first-order-lag (recomputed by closedforms.py).
			name: "first-order lag",
			a:    mat.NewDense(1, 1, []float64{-0.5}),
			b:    mat.NewDense(1, 1, []float64{1.5}),
			qc:   mat.NewSymDense(1, []float64{1}),
			ts:   0.5,
			ad:   mat.NewDense(1, 1, []float64{0.7788007830714049}),
			bd:   mat.NewDense(1, 1, []float64{0.6635976507857854}),
			qd:   mat.NewSymDense(1, []float64{0.3934693402873666}),
			tol:  1e-15,
		},
		{
			// SOURCES.md: scipy-c2d, TestC2D.test_zoh.
			name: "scipy test_zoh",
			a:    mat.NewDense(2, 2, []float64{1, 0, 0, 1}),
			b:    mat.NewDense(2, 1, []float64{0.5, 0.5}),
			ts:   0.5,
			ad:   mat.NewDense(2, 2, []float64{1.648721270700128, 0, 0, 1.648721270700128}),
			bd:   mat.NewDense(2, 1, []float64{0.324360635350064, 0.324360635350064}),
			tol:  1e-14,
		},
		{
			// SOURCES.md: scipy-c2d, TestC2dLti.test_c2d_ss.
			name: "scipy test_c2d_ss",
			a:    mat.NewDense(2, 2, []float64{-0.3, 0.1, 0.2, -0.7}),
			b:    mat.NewDense(2, 1, []float64{0, 1}),
			ts:   0.05,
			ad: mat.NewDense(2, 2, []float64{
				0.985136404135682, 0.004876671474795,
				0.009753342949590, 0.965629718236502,
			}),
			bd:  mat.NewDense(2, 1, []float64{0.000122937599964, 0.049135527547844}),
			tol: 1e-14,
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var qc mat.Symmetric
			if tc.qc != nil {
				qc = tc.qc
			}
			ad, bd, qd := Discretise(tc.a, tc.b, qc, tc.ts)
			if d := discretiseMaxDiff(ad, tc.ad); d > tc.tol {
				t.Errorf("Ad = %v, want %v (max diff %.3g)", mat.Formatted(ad), mat.Formatted(tc.ad), d)
			}
			if d := discretiseMaxDiff(bd, tc.bd); d > tc.tol {
				t.Errorf("Bd = %v, want %v (max diff %.3g)", mat.Formatted(bd), mat.Formatted(tc.bd), d)
			}
			switch {
			case tc.qc == nil && qd != nil:
				t.Errorf("Qd = %v for nil Qc, want nil", mat.Formatted(qd))
			case tc.qd != nil:
				if d := discretiseMaxDiff(qd, tc.qd); d > tc.tol*math.Max(1, mat.Norm(tc.qd, math.Inf(1))) {
					t.Errorf("Qd = %v, want %v (max diff %.3g)", mat.Formatted(qd), mat.Formatted(tc.qd), d)
				}
			}
		})
	}
}

// TestDiscretisePoles checks the eigenvalues of Ad against scipy's
// signal/tests/test_cont2discrete.py, TestC2D.test_zerospolesgain: continuous
// poles ±j/√2, T = 0.5, discrete poles 0.938148335039729 ± 0.346233593780536j.
func TestDiscretisePoles(t *testing.T) {
	a := mat.NewDense(2, 2, []float64{0, 1, -0.5, 0}) // characteristic polynomial s² + 1/2
	ad, _, _ := Discretise(a, nil, nil, 0.5)
	var eig mat.Eigen
	if !eig.Factorize(ad, mat.EigenNone) {
		t.Fatal("eigen decomposition failed")
	}
	got := eig.Values(nil)
	sort.Slice(got, func(i, j int) bool { return imag(got[i]) > imag(got[j]) })
	want := []complex128{0.938148335039729 + 0.346233593780536i, 0.938148335039729 - 0.346233593780536i}
	for i := range want {
		if cmplx.Abs(got[i]-want[i]) > 1e-14 {
			t.Errorf("pole %d = %v, want %v", i, got[i], want[i])
		}
	}
}

// TestExpStiff checks the matrix exponential Discretise relies on against
// the stiff example of SOURCES.md: stiff-exponential: expm of the 4×4
// matrix below is 0.25·ones(4) (closed form, by its eigenvalues). A truncated Taylor series fails here by many orders of
// magnitude. scipy.linalg.expm (1.10) is off by 2.1e-14 relative; gonum's
// Exp by about 1e-14, so the tolerance is 1e-13 relative.
func TestExpStiff(t *testing.T) {
	a := mat.NewDense(4, 4, []float64{
		-200, 100, 100, 0,
		100, -200, 0, 100,
		100, 0, -200, 100,
		0, 100, 100, -200,
	})
	ad, _, _ := Discretise(a, nil, nil, 1)
	want := mat.NewDense(4, 4, nil)
	for i := 0; i < 4; i++ {
		for j := 0; j < 4; j++ {
			want.Set(i, j, 0.25)
		}
	}
	if d := discretiseMaxDiff(ad, want); d > 0.25*1e-13 {
		t.Errorf("expm = %v, want 0.25·ones (max diff %.3g)", mat.Formatted(ad), d)
	}
}

type discretiseFixture struct {
	Source string `json:"source"`
	Cases  []struct {
		Name string      `json:"name"`
		Seed int64       `json:"seed"`
		Ts   float64     `json:"ts"`
		A    [][]float64 `json:"a"`
		B    [][]float64 `json:"b"`
		Qc   [][]float64 `json:"qc"`
		Ad   [][]float64 `json:"ad"`
		Bd   [][]float64 `json:"bd"`
		Qd   [][]float64 `json:"qd"`
	} `json:"cases"`
}

func discretiseDense(rows [][]float64) *mat.Dense {
	m := mat.NewDense(len(rows), len(rows[0]), nil)
	for i, r := range rows {
		m.SetRow(i, r)
	}
	return m
}

// TestDiscretiseFixture compares random 5-state, 2-input systems with values
// recomputed by scipy (SOURCES.md: discretise-random; discretise.py: Ad, Bd from
// scipy.linalg.expm of the augmented matrix, checked against
// scipy.signal.cont2discrete; Qd from adaptive quadrature of the defining
// integral, checked against scipy's Van Loan exponential).
func TestDiscretiseFixture(t *testing.T) {
	raw, err := os.ReadFile(filepath.Join("..", "testdata", "reference", "discretise.json"))
	if err != nil {
		t.Fatal(err)
	}
	var fx discretiseFixture
	if err := json.Unmarshal(raw, &fx); err != nil {
		t.Fatalf("discretise.json: %v", err)
	}
	if len(fx.Cases) == 0 {
		t.Fatal("discretise.json has no cases")
	}
	for _, c := range fx.Cases {
		t.Run(c.Name, func(t *testing.T) {
			qc := discretiseDense(c.Qc)
			n, _ := qc.Dims()
			qcs := mat.NewSymDense(n, nil)
			for i := 0; i < n; i++ {
				for j := i; j < n; j++ {
					qcs.SetSym(i, j, qc.At(i, j))
				}
			}
			ad, bd, qd := Discretise(discretiseDense(c.A), discretiseDense(c.B), qcs, c.Ts)
			for _, chk := range []struct {
				name      string
				got, want mat.Matrix
				rel       float64
			}{
				// Relative to the largest entry of the reference. Measured:
				// about 2e-16 for Ad and Bd, at most 2.3e-15 for Qd; one Van
				// Loan exponential over the whole long sample is off by
				// 6.5e-13 and must fail here.
				{"Ad", ad, discretiseDense(c.Ad), 1e-14},
				{"Bd", bd, discretiseDense(c.Bd), 1e-14},
				{"Qd", qd, discretiseDense(c.Qd), 1e-13},
			} {
				scale := mat.Norm(chk.want, math.Inf(1))
				if d := discretiseMaxDiff(chk.got, chk.want); d > chk.rel*scale {
					t.Errorf("%s differs from scipy by %.3g (scale %.3g)\ngot  %v\nwant %v",
						chk.name, d, scale, mat.Formatted(chk.got), mat.Formatted(chk.want))
				}
			}
		})
	}
}

func TestDiscretiseNil(t *testing.T) {
	a := mat.NewDense(1, 1, []float64{-1})
	ad, bd, qd := Discretise(a, nil, nil, 1)
	if bd != nil || qd != nil {
		t.Errorf("Bd, Qd = %v, %v for nil B and Qc, want nil", bd, qd)
	}
	// e^{−1} (closed form).
	if got := ad.At(0, 0); math.Abs(got-math.Exp(-1)) > 1e-16 {
		t.Errorf("Ad = %v, want e^-1", got)
	}
}

func TestDiscretisePanics(t *testing.T) {
	sq := mat.NewDense(2, 2, []float64{0, 1, 0, 0})
	b2 := mat.NewDense(2, 1, []float64{0, 1})
	tests := []struct {
		name string
		a, b mat.Matrix
		qc   mat.Symmetric
		ts   float64
	}{
		{"A not square", mat.NewDense(2, 3, nil), nil, nil, 1},
		{"B rows", sq, mat.NewDense(3, 1, nil), nil, 1},
		{"Qc size", sq, b2, mat.NewSymDense(3, nil), 1},
		{"ts zero", sq, b2, nil, 0},
		{"ts negative", sq, b2, nil, -0.1},
		{"ts NaN", sq, b2, nil, math.NaN()},
		{"ts Inf", sq, b2, nil, math.Inf(1)},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			defer func() {
				if r := recover(); r == nil {
					t.Error("no panic")
				} else if s := fmt.Sprint(r); len(s) < len("estimator: Discretise") || s[:len("estimator: Discretise")] != "estimator: Discretise" {
					t.Errorf("panic %q, want one naming Discretise", s)
				}
			}()
			Discretise(tc.a, tc.b, tc.qc, tc.ts)
		})
	}
}
