package estimator

import (
	"math"
	"math/cmplx"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// doubleIntegrator returns Φ and C of the sampled double integrator with
// position measured: Φ = [[1, T], [0, 1]], C = [1, 0] (SOURCES.md:
// double-integrator).
func doubleIntegrator(ts float64) (a, c *mat.Dense) {
	return mat.NewDense(2, 2, []float64{1, ts, 0, 1}), mat.NewDense(1, 2, []float64{1, 0})
}

// knvExample1 is example 1 of Kautsky, Nichols and Van Dooren (1985), as
// printed in scipy's signal/tests/test_ltisys.py (SOURCES.md: knv).
func knvExample1() (a, b *mat.Dense) {
	a = mat.NewDense(4, 4, []float64{
		1.380, -0.2077, 6.715, -5.676,
		-0.5814, -4.290, 0, 0.6750,
		1.067, 4.273, -6.654, 5.893,
		0.0480, 4.273, 1.343, -2.104,
	})
	b = mat.NewDense(4, 2, []float64{
		0, 5.679,
		1.136, 1.136,
		0, 0,
		-3.146, 0,
	})
	return a, b
}

// assertPoles checks that the eigenvalues of m equal want (as multisets) to
// within tol·max(1, |p|), matching each wanted pole to the nearest unused
// eigenvalue.
func assertPoles(t *testing.T, m mat.Matrix, want []complex128, tol float64) {
	t.Helper()
	got := Eigenvalues(m)
	if len(got) != len(want) {
		t.Fatalf("got %d eigenvalues, want %d", len(got), len(want))
	}
	used := make([]bool, len(got))
	for _, w := range want {
		best, bestD := -1, math.Inf(1)
		for i, g := range got {
			if d := cmplx.Abs(g - w); !used[i] && d < bestD {
				best, bestD = i, d
			}
		}
		used[best] = true
		if bestD > tol*math.Max(1, cmplx.Abs(w)) {
			t.Errorf("pole %v: nearest eigenvalue %v is %.3g away (tolerance %.3g); all eigenvalues %v", w, got[best], bestD, tol, got)
		}
	}
}

func closedLoop(a, b, k mat.Matrix) *mat.Dense {
	var bk, cl mat.Dense
	bk.Mul(b, k)
	cl.Sub(a, &bk)
	return &cl
}

func TestEigenvaluesOrder(t *testing.T) {
	// Block-diagonal matrix whose eigenvalues are read off its blocks
	// (common practice): 0.5 ± 0.5i from [[0.5, -0.5], [0.5, 0.5]], then −0.9
	// and 0.2.
	a := mat.NewDense(4, 4, []float64{
		0.5, -0.5, 0, 0,
		0.5, 0.5, 0, 0,
		0, 0, -0.9, 0,
		0, 0, 0, 0.2,
	})
	got := Eigenvalues(a)
	want := []complex128{-0.9, complex(0.5, 0.5), complex(0.5, -0.5), 0.2}
	for i := range want {
		if cmplx.Abs(got[i]-want[i]) > 1e-14 {
			t.Fatalf("Eigenvalues = %v, want %v", got, want)
		}
	}
	if Eigenvalues(mat.NewDense(1, 1, []float64{math.NaN()})) != nil {
		t.Error("Eigenvalues of a NaN matrix should be nil")
	}
}

func TestOutputRowsAndCov(t *testing.T) {
	c := mat.NewDense(3, 2, []float64{1, 2, 3, 4, 5, 6})
	r := mat.NewSymDense(3, []float64{1, 0.1, 0.2, 0.1, 2, 0.3, 0.2, 0.3, 3})
	s := Pattern(0b101)
	// Expected: rows (and the R block) of outputs 0 and 2, by definition.
	if got, want := OutputRows(c, s), mat.NewDense(2, 2, []float64{1, 2, 5, 6}); !mat.Equal(got, want) {
		t.Errorf("OutputRows = %v, want %v", mat.Formatted(got), mat.Formatted(want))
	}
	if got, want := OutputCov(r, s), mat.NewSymDense(2, []float64{1, 0.2, 0.2, 3}); !mat.Equal(got, want) {
		t.Errorf("OutputCov = %v, want %v", mat.Formatted(got), mat.Formatted(want))
	}
	for _, bad := range []Pattern{0, 0b1000} {
		func() {
			defer func() {
				if recover() == nil {
					t.Errorf("OutputRows with pattern %b did not panic", bad)
				}
			}()
			OutputRows(c, bad)
		}()
	}
}

func TestErrorDynamics(t *testing.T) {
	// A − L·C and A − L·C·A written out by hand for a 2-state, 1-output case
	// (definition).
	a := mat.NewDense(2, 2, []float64{1, 0.1, 0, 1})
	c := mat.NewDense(1, 2, []float64{1, 0})
	l := mat.NewDense(2, 1, []float64{0.5, 2})
	pred := mat.NewDense(2, 2, []float64{0.5, 0.1, -2, 1})
	// L·C·A = [0.5; 2]·[1, 0.1] = [[0.5, 0.05], [2, 0.2]].
	cur := mat.NewDense(2, 2, []float64{0.5, 0.05, -2, 0.8})
	if got := ErrorDynamics(a, c, l, Prediction); !mat.EqualApprox(got, pred, 1e-15) {
		t.Errorf("prediction error dynamics %v, want %v", mat.Formatted(got), mat.Formatted(pred))
	}
	if got := ErrorDynamics(a, c, l, Current); !mat.EqualApprox(got, cur, 1e-15) {
		t.Errorf("current error dynamics %v, want %v", mat.Formatted(got), mat.Formatted(cur))
	}
}

func TestPlaceObserverDoubleIntegrator(t *testing.T) {
	const ts = 0.1
	a, c := doubleIntegrator(ts)
	// Closed forms for the double integrator with C = [1, 0] (SOURCES.md:
	// double-integrator-placement): L_p = [2 − p₁ − p₂, (1 − p₁)(1 − p₂)/T],
	// L_c = [1 − p₁p₂, (1 − p₁)(1 − p₂)/T].
	closed := func(p1, p2 complex128) [2][2]float64 {
		return [2][2]float64{
			{real(2 - p1 - p2), real((1 - p1) * (1 - p2) / ts)},
			{real(1 - p1*p2), real((1 - p1) * (1 - p2) / ts)},
		}
	}
	tests := []struct {
		name  string
		poles []complex128
		want  [2][2]float64 // L_p, L_c
	}{
		// T = 0.1, poles 0.5, 0.5 → L_p = [1, 2.5], L_c = [0.75, 2.5]
		// (SOURCES.md: double-integrator-placement).
		{"repeated 0.5", []complex128{0.5, 0.5}, [2][2]float64{{1, 2.5}, {0.75, 2.5}}},
		{"distinct", []complex128{0.3, 0.6}, closed(0.3, 0.6)},
		{"complex pair", []complex128{complex(0.6, 0.2), complex(0.6, -0.2)}, closed(complex(0.6, 0.2), complex(0.6, -0.2))},
		{"deadbeat", []complex128{0, 0}, closed(0, 0)},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			for _, f := range []struct {
				form Form
				want [2]float64
			}{{Prediction, tt.want[0]}, {Current, tt.want[1]}} {
				l, err := PlaceObserver(a, c, f.form, tt.poles)
				if err != nil {
					t.Fatalf("%v: %v", f.form, err)
				}
				for i := 0; i < 2; i++ {
					if got := l.At(i, 0); math.Abs(got-f.want[i]) > 1e-12*math.Max(1, math.Abs(f.want[i])) {
						t.Errorf("%v: L[%d] = %.15g, want %.15g", f.form, i, got, f.want[i])
					}
				}
			}
		})
	}
}

func TestPlaceKNVExample1(t *testing.T) {
	a, b := knvExample1()
	tests := []struct {
		name  string
		poles []complex128
	}{
		// Poles of example 1 (SOURCES.md: knv).
		{"published", []complex128{-0.2, -0.5, -5.0566, -8.6659}},
		// Repeated poles, each as often as B has rank (scipy's
		// test_ltisys.py uses (2, 2, 3, 3) on the same system).
		{"repeated within rank", []complex128{2, 2, 3, 3}},
		{"complex pairs", []complex128{complex(-1, 2), complex(-1, -2), complex(-3, 0.5), complex(-3, -0.5)}},
		// More repeats than inputs: needs the single-input reduction.
		{"repeated beyond rank", []complex128{-1, -1, -1, -2}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			k, err := Place(a, b, tt.poles)
			if err != nil {
				t.Fatal(err)
			}
			if r, c := k.Dims(); r != 2 || c != 4 {
				t.Fatalf("K is %d×%d, want 2×4", r, c)
			}
			// Multi-input gains are not unique: check the achieved
			// eigenvalues (SOURCES.md: knv).
			m := closedLoop(a, b, k)
			if tt.name != "repeated beyond rank" {
				assertPoles(t, m, tt.poles, 1e-6)
				return
			}
			// A triple pole is defective and its computed eigenvalues
			// scatter by about (u‖M‖)^(1/3); check instead that
			// φ(M) = (M + I)³(M + 2I) = 0 (Cayley–Hamilton) and
			// trace M = −5: together they fix the characteristic
			// polynomial (s + 1)³(s + 2).
			var mi, m2 mat.Dense
			mi.Add(m, eye(4))
			m2.Scale(2, eye(4))
			m2.Add(m, &m2)
			var phi mat.Dense
			phi.Mul(matPow(&mi, 3), &m2)
			scale := math.Pow(math.Max(1, mat.Norm(m, 2)), 4)
			if got := mat.Norm(&phi, 2); got > 1e-12*scale {
				t.Errorf("‖φ(A − BK)‖ = %.3g, want ≈ 0 (scale %.3g)", got, scale)
			}
			if tr := mat.Trace(m); math.Abs(tr+5) > 1e-9*math.Max(1, mat.Norm(m, 2)) {
				t.Errorf("trace(A − BK) = %.15g, want −5", tr)
			}
		})
	}
}

func TestPlaceComplexCarModel(t *testing.T) {
	// Linearised car model with complex poles (SOURCES.md: knv), from scipy's
	// signal/tests/test_ltisys.py (test_complex).
	a := mat.NewDense(4, 4, []float64{0, 7, 0, 0, 0, 0, 0, 7. / 3, 0, 0, 0, 0, 0, 0, 0, 0})
	b := mat.NewDense(4, 2, []float64{0, 0, 0, 0, 1, 0, 0, 1})
	poles := []complex128{-3, -1, complex(-2, -1), complex(-2, 1)}
	k, err := Place(a, b, poles)
	if err != nil {
		t.Fatal(err)
	}
	assertPoles(t, closedLoop(a, b, k), poles, 1e-6)
}

func TestPlaceSquareB(t *testing.T) {
	// B of full row rank: any poles are reachable and the gain is
	// B⁻¹(A − M) for a real M with those eigenvalues (definition); the poles
	// (−2 ± i, −3, −2) are those scipy's test_ltisys.py uses for this case.
	a, _ := knvExample1()
	b := mat.NewDense(4, 4, []float64{1, 2, 0, 0, 0, 1, 3, 0, 0, 0, 1, 4, 5, 0, 0, 1})
	poles := []complex128{complex(-2, 1), complex(-2, -1), -3, -2}
	k, err := Place(a, b, poles)
	if err != nil {
		t.Fatal(err)
	}
	assertPoles(t, closedLoop(a, b, k), poles, 1e-6)
}

func eye(n int) *mat.Dense {
	d := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		d.Set(i, i, 1)
	}
	return d
}

// matPow returns mᵏ.
func matPow(m *mat.Dense, k int) *mat.Dense {
	r, _ := m.Dims()
	out := mat.NewDense(r, r, nil)
	for i := 0; i < r; i++ {
		out.Set(i, i, 1)
	}
	for ; k > 0; k-- {
		var next mat.Dense
		next.Mul(out, m)
		out = &next
	}
	return out
}

func TestPlaceObserverDeadbeat(t *testing.T) {
	// A deadbeat observer has nilpotent error dynamics: (A − LC)ⁿ = 0 by the
	// Cayley–Hamilton theorem (common practice).
	tests := []struct {
		name string
		a, c *mat.Dense
	}{
		{
			// Sampled triple integrator, T = 0.5 (Φ = e^{AT} in closed form).
			"triple integrator",
			mat.NewDense(3, 3, []float64{1, 0.5, 0.125, 0, 1, 0.5, 0, 0, 1}),
			mat.NewDense(1, 3, []float64{1, 0, 0}),
		},
		{
			"four states, one output",
			mat.NewDense(4, 4, []float64{0.9, 0.1, 0, 0, 0, 0.8, 0.2, 0, 0, 0, 0.7, 0.3, 0.05, 0, 0, 0.95}),
			mat.NewDense(1, 4, []float64{1, 0, 0, 0}),
		},
		{
			// Two outputs, four poles at 0: more repeats than outputs, so the
			// single-input reduction does the work.
			"four states, two outputs",
			mat.NewDense(4, 4, []float64{0.9, 0.1, 0, 0, 0, 0.8, 0.2, 0, 0, 0, 0.7, 0.3, 0.05, 0, 0, 0.95}),
			mat.NewDense(2, 4, []float64{1, 0, 0, 0, 0, 0, 1, 0}),
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			n, _ := tt.a.Dims()
			for _, form := range []Form{Prediction, Current} {
				l, err := PlaceObserver(tt.a, tt.c, form, make([]complex128, n))
				if err != nil {
					t.Fatalf("%v: %v", form, err)
				}
				e := ErrorDynamics(tt.a, tt.c, l, form)
				pn := matPow(e, n)
				scale := math.Pow(math.Max(1, mat.Norm(e, 2)), float64(n))
				if got := mat.Norm(pn, 2); got > 1e-10*scale {
					t.Errorf("%v: ‖(error dynamics)^%d‖ = %.3g, want ≈ 0 (scale %.3g)", form, n, got, scale)
				}
			}
		})
	}
}

func TestPlaceRefusals(t *testing.T) {
	a, c := doubleIntegrator(0.1)
	tests := []struct {
		name  string
		run   func() error
		inErr string
	}{
		{"unpaired complex pole", func() error {
			_, err := PlaceObserver(a, c, Prediction, []complex128{complex(0.5, 0.1), 0.5})
			return err
		}, "conjugate"},
		{"pair with a different partner", func() error {
			_, err := PlaceObserver(a, c, Prediction, []complex128{complex(0.5, 0.1), complex(0.5, -0.2)})
			return err
		}, "conjugate"},
		{"wrong count", func() error {
			_, err := PlaceObserver(a, c, Prediction, []complex128{0.5})
			return err
		}, "1 poles requested for 2 states"},
		{"non-finite pole", func() error {
			_, err := PlaceObserver(a, c, Prediction, []complex128{cmplx.NaN(), 0.5})
			return err
		}, "not finite"},
		{"unobservable pair", func() error {
			// Two decoupled modes, only the first measured: the mode 0.8
			// cannot be seen (PBH test, common practice).
			_, err := PlaceObserver(mat.NewDense(2, 2, []float64{0.5, 0, 0, 0.8}), c, Prediction, []complex128{0.1, 0.2})
			return err
		}, "not observable: mode(s) 0.8"},
		{"current form needs (A, CA) observable", func() error {
			// A = [[0, 1], [0, 0]] with C = [1, 0] is observable but
			// C·A = [0, 1] does not see the mode at 0.
			_, err := PlaceObserver(mat.NewDense(2, 2, []float64{0, 1, 0, 0}), c, Current, []complex128{0.1, 0.2})
			return err
		}, "(A, C·A) is not observable"},
		{"uncontrollable", func() error {
			_, err := Place(mat.NewDense(2, 2, []float64{0.5, 0, 0, 0.8}), mat.NewDense(2, 1, []float64{1, 0}), []complex128{0.1, 0.2})
			return err
		}, "not controllable"},
		{"zero B", func() error {
			_, err := Place(mat.NewDense(1, 1, []float64{0.5}), mat.NewDense(1, 1, []float64{0}), []complex128{0.1})
			return err
		}, "not controllable"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			err := tt.run()
			if err == nil {
				t.Fatal("want an error, got nil")
			}
			if !strings.Contains(err.Error(), tt.inErr) {
				t.Errorf("error %q does not mention %q", err, tt.inErr)
			}
		})
	}
}

func TestCheckPolesRefusesAMiss(t *testing.T) {
	// The post-design check must refuse a matrix whose eigenvalues (0.5 and
	// 0.7, read off the diagonal) differ from the request.
	m := mat.NewDense(2, 2, []float64{0.5, 1, 0, 0.7})
	if _, err := checkPoles(m, []complex128{0.5, 0.7 + 1e-4}); err == nil {
		t.Error("a miss of 1e-4 was accepted")
	}
	if _, err := checkPoles(m, []complex128{0.7, 0.5}); err != nil {
		t.Errorf("exact poles refused: %v", err)
	}
}

func TestNormalisePolesOrder(t *testing.T) {
	ps, err := normalisePoles([]complex128{complex(0.1, -0.2), 0.3, complex(0.1, 0.2)}, 3)
	if err != nil {
		t.Fatal(err)
	}
	want := []complex128{0.3, complex(0.1, 0.2), complex(0.1, -0.2)}
	for i := range want {
		if ps[i] != want[i] {
			t.Fatalf("normalisePoles = %v, want %v", ps, want)
		}
	}
}
