package estimator

import (
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// rowsDense builds a dense matrix from its rows.
func rowsDense(rows [][]float64) *mat.Dense {
	d := mat.NewDense(len(rows), len(rows[0]), nil)
	for i, r := range rows {
		d.SetRow(i, r)
	}
	return d
}

// rowsSym builds a symmetric matrix from its rows (the upper triangle is used).
func rowsSym(rows [][]float64) *mat.SymDense {
	s := mat.NewSymDense(len(rows), nil)
	for i := range rows {
		for j := i; j < len(rows); j++ {
			s.SetSym(i, j, rows[i][j])
		}
	}
	return s
}

func diagSym(v ...float64) *mat.SymDense {
	s := mat.NewSymDense(len(v), nil)
	for i, x := range v {
		s.SetSym(i, i, x)
	}
	return s
}

// relErr returns ‖got − want‖_F / max(‖want‖_F, tiny).
func relErr(got, want mat.Matrix) float64 {
	var d mat.Dense
	d.Sub(got, want)
	return mat.Norm(&d, 2) / math.Max(mat.Norm(want, 2), 1e-300)
}

// dareResidualTest evaluates AᵀXA − X − AᵀXB(R + BᵀXB)⁻¹BᵀXA + Q
// independently of the solver's own check.
func dareResidualTest(t *testing.T, a, b mat.Matrix, q, r mat.Symmetric, x mat.Symmetric) *mat.Dense {
	t.Helper()
	var axa, axb, s, bxa, sinv, corr, res mat.Dense
	axa.Product(a.T(), x, a)
	axb.Product(a.T(), x, b)
	s.Product(b.T(), x, b)
	s.Add(&s, r)
	if err := sinv.Inverse(&s); err != nil {
		t.Fatalf("R + BᵀXB not invertible: %v", err)
	}
	bxa.Product(b.T(), x, a)
	corr.Product(&axb, &sinv, &bxa)
	res.Sub(&axa, x)
	res.Sub(&res, &corr)
	res.Add(&res, q)
	return &res
}

func TestSolveDAREClosedForms(t *testing.T) {
	phi := (1 + math.Sqrt(5)) / 2
	shift := func(n int) *mat.Dense {
		a := mat.NewDense(n, n, nil)
		for i := 0; i+1 < n; i++ {
			a.Set(i, i+1, 1)
		}
		return a
	}
	en := func(n int) *mat.Dense {
		b := mat.NewDense(n, 1, nil)
		b.Set(n-1, 0, 1)
		return b
	}
	ramp := func(n int) *mat.SymDense {
		v := make([]float64, n)
		for i := range v {
			v[i] = float64(i + 1)
		}
		return diagSym(v...)
	}
	identity := func(n int) *mat.SymDense {
		v := make([]float64, n)
		for i := range v {
			v[i] = 1
		}
		return diagSym(v...)
	}
	tests := []struct {
		name string
		a, b *mat.Dense
		q, r *mat.SymDense
		want *mat.SymDense
		tol  float64 // relative, Frobenius
	}{
		// DAREX #1 (SOURCES.md: darex): X = ((1 + √5)/2)·Q.
		{"DAREX 1", rowsDense([][]float64{{4, 3}, {-4.5, -3.5}}), rowsDense([][]float64{{1}, {-1}}),
			rowsSym([][]float64{{9, 6}, {6, 4}}), diagSym(1),
			rowsSym([][]float64{{9 * phi, 6 * phi}, {6 * phi, 4 * phi}}), 1e-12},
		// DAREX #3: R = 0 (singular), X = I.
		{"DAREX 3 (R = 0)", rowsDense([][]float64{{2, -1}, {1, 0}}), rowsDense([][]float64{{1}, {0}}),
			diagSym(0, 1), diagSym(0), identity(2), 1e-12},
		// DAREX #5: X = [[1, 2], [2, 2 + √5]].
		{"DAREX 5", rowsDense([][]float64{{0, 1}, {0, 0}}), rowsDense([][]float64{{0}, {1}}),
			rowsSym([][]float64{{1, 2}, {2, 4}}), diagSym(1),
			rowsSym([][]float64{{1, 2}, {2, 2 + math.Sqrt(5)}}), 1e-12},
		// DAREX #12: X = diag(1, 1 + d²). The problem's condition grows
		// like d², so the tolerance is 1e-14·d²: 1e-10 for d = 1e2, 1e-6 for
		// d = 1e4.
		{"DAREX 12, d = 1e2", rowsDense([][]float64{{0, 1e2}, {0, 0}}), rowsDense([][]float64{{0}, {1}}),
			identity(2), diagSym(1), diagSym(1, 1+1e4), 1e-10},
		{"DAREX 12, d = 1e4", rowsDense([][]float64{{0, 1e4}, {0, 0}}), rowsDense([][]float64{{0}, {1}}),
			identity(2), diagSym(1), diagSym(1, 1+1e8), 1e-6},
		// DAREX #15: upper shift, B = e_n, Q = I, any r > 0: X = diag(1, …, n).
		{"DAREX 15, n = 5", shift(5), en(5), identity(5), diagSym(1), ramp(5), 1e-12},
		{"DAREX 15, n = 10, r = 0.25", shift(10), en(10), identity(10), diagSym(0.25), ramp(10), 1e-12},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			x, err := SolveDARE(tt.a, tt.b, tt.q, tt.r)
			if err != nil {
				t.Fatal(err)
			}
			if e := relErr(x, tt.want); e > tt.tol {
				t.Errorf("relative error %.3g > %.0e\n got %v\nwant %v", e, tt.tol, mat.Formatted(x), mat.Formatted(tt.want))
			}
		})
	}
}

type riccatiFixture struct {
	Dare []struct {
		Name       string
		A, B, Q, R [][]float64
		X          [][]float64
		Decimals   int
	}
	Lyapunov []struct {
		Name    string
		A, Q, X [][]float64
	}
	Kalman []struct {
		Name                string
		A, C, Q, R          [][]float64
		P, Pplus, S, Lc, Lp [][]float64
	}
}

func loadRiccatiFixture(t *testing.T) *riccatiFixture {
	t.Helper()
	// Written by testdata/reference/riccati.py (scipy 1.10; SOURCES.md: darex,
	// lyapunov-kalman).
	raw, err := os.ReadFile(filepath.Join("..", "testdata", "reference", "riccati.json"))
	if err != nil {
		t.Fatal(err)
	}
	var f riccatiFixture
	if err := json.Unmarshal(raw, &f); err != nil {
		t.Fatal(err)
	}
	if len(f.Dare) == 0 || len(f.Lyapunov) == 0 || len(f.Kalman) == 0 {
		t.Fatal("riccati.json has an empty section")
	}
	return &f
}

func TestSolveDAREFixture(t *testing.T) {
	f := loadRiccatiFixture(t)
	for _, c := range f.Dare {
		t.Run(c.Name, func(t *testing.T) {
			a, b, q, r := rowsDense(c.A), rowsDense(c.B), rowsSym(c.Q), rowsSym(c.R)
			x, err := SolveDARE(a, b, q, r)
			if err != nil {
				t.Fatal(err)
			}
			// The residual bound of scipy's test_solvers.py for this DAREX
			// example: every entry below 1.5·10^−decimals.
			res := dareResidualTest(t, a, b, q, r, x)
			if got, lim := mat.Norm(res, math.Inf(1)), 1.5*math.Pow(10, -float64(c.Decimals)); maxAbs(res) > lim {
				t.Errorf("residual %.3g (max entry %.3g) above scipy's bound %.3g", got, maxAbs(res), lim)
			}
			// And X itself agrees with scipy.linalg.solve_discrete_are.
			if e := relErr(x, rowsDense(c.X)); e > 1e-9 {
				t.Errorf("relative difference from scipy %.3g > 1e-9", e)
			}
		})
	}
}

func maxAbs(m mat.Matrix) float64 {
	r, c := m.Dims()
	var v float64
	for i := 0; i < r; i++ {
		for j := 0; j < c; j++ {
			v = math.Max(v, math.Abs(m.At(i, j)))
		}
	}
	return v
}

func TestSolveDARERefusals(t *testing.T) {
	tests := []struct {
		name  string
		a, b  *mat.Dense
		q, r  *mat.SymDense
		inErr string
	}{
		// The mode 1.5 is unstable and not reachable from B: no stabilising
		// solution exists (definition of stabilisability).
		{"not stabilisable", rowsDense([][]float64{{1.5, 0}, {0, 0.5}}), rowsDense([][]float64{{0}, {1}}),
			diagSym(1, 1), diagSym(1), ""},
		// A = 1 with Q = 0: X = 0 solves the equation but leaves the closed
		// loop at 1, so it is not stabilising (Q does not see the mode).
		{"mode on the unit circle unseen by Q", rowsDense([][]float64{{1}}), rowsDense([][]float64{{1}}),
			diagSym(0), diagSym(1), "stabilising"},
		{"R indefinite", rowsDense([][]float64{{0.5}}), rowsDense([][]float64{{1}}),
			diagSym(1), diagSym(-1), "not positive semidefinite"},
		{"Q not finite", rowsDense([][]float64{{0.5}}), rowsDense([][]float64{{1}}),
			diagSym(math.NaN()), diagSym(1), "finite"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			x, err := SolveDARE(tt.a, tt.b, tt.q, tt.r)
			if err == nil {
				t.Fatalf("want an error, got X = %v", mat.Formatted(x))
			}
			if !strings.Contains(err.Error(), tt.inErr) {
				t.Errorf("error %q does not mention %q", err, tt.inErr)
			}
		})
	}
}

func TestSolveDiscreteLyapunov(t *testing.T) {
	// Scalar closed form: x = q/(1 − a²); a = 0.9, q = 2 → 2/0.19.
	x, err := SolveDiscreteLyapunov(rowsDense([][]float64{{0.9}}), diagSym(2))
	if err != nil {
		t.Fatal(err)
	}
	if want := 2 / 0.19; math.Abs(x.At(0, 0)-want) > 1e-13*want {
		t.Errorf("scalar: x = %.17g, want %.17g", x.At(0, 0), want)
	}
	// Fixtures from scipy.linalg.solve_discrete_lyapunov (SOURCES.md:
	// lyapunov-kalman).
	f := loadRiccatiFixture(t)
	for _, c := range f.Lyapunov {
		t.Run(c.Name, func(t *testing.T) {
			x, err := SolveDiscreteLyapunov(rowsDense(c.A), rowsSym(c.Q))
			if err != nil {
				t.Fatal(err)
			}
			if e := relErr(x, rowsDense(c.X)); e > 1e-10 {
				t.Errorf("relative difference from scipy %.3g > 1e-10", e)
			}
		})
	}
	// A not Schur stable is refused.
	for _, a := range []float64{1, -1.2} {
		if _, err := SolveDiscreteLyapunov(rowsDense([][]float64{{a}}), diagSym(1)); err == nil || !strings.Contains(err.Error(), "not Schur stable") {
			t.Errorf("a = %v: error %v, want a refusal naming Schur stability", a, err)
		}
	}
}

func TestSteadyStateKalmanRandomWalk(t *testing.T) {
	// Scalar random walk A = C = 1: P⁻ = (q + √(q² + 4qr))/2, K = P⁻/(P⁻ + r)
	// (SOURCES.md: random-walk-riccati); q = r = 1 gives 1.6180339887 and 0.6180339887. The a
	// posteriori P⁺ = (1 − K)·P⁻ (common practice).
	tests := []struct {
		q, r  float64
		p, k  float64
		tolAb float64
	}{
		{1, 1, 1.6180339887, 0.6180339887, 1e-10},
		{2, 0.5, (2 + math.Sqrt(4+4)) / 2, (2 + math.Sqrt(8)) / 2 / ((2+math.Sqrt(8))/2 + 0.5), 1e-13},
	}
	for _, tt := range tests {
		g, err := SteadyStateKalman(rowsDense([][]float64{{1}}), rowsDense([][]float64{{1}}), diagSym(tt.q), diagSym(tt.r))
		if err != nil {
			t.Fatal(err)
		}
		check := func(name string, got, want float64) {
			if math.Abs(got-want) > tt.tolAb {
				t.Errorf("q = %v, r = %v: %s = %.12g, want %.12g", tt.q, tt.r, name, got, want)
			}
		}
		check("P", g.P.At(0, 0), tt.p)
		check("Lc", g.Lc.At(0, 0), tt.k)
		check("Lp = A·Lc", g.Lp.At(0, 0), tt.k)
		check("S", g.S.At(0, 0), tt.p+tt.r)
		check("P⁺", g.Pplus.At(0, 0), (1-tt.k)*tt.p)
	}
}

func TestSteadyStateKalmanFixture(t *testing.T) {
	f := loadRiccatiFixture(t)
	for _, c := range f.Kalman {
		t.Run(c.Name, func(t *testing.T) {
			a, cm := rowsDense(c.A), rowsDense(c.C)
			g, err := SteadyStateKalman(a, cm, rowsSym(c.Q), rowsSym(c.R))
			if err != nil {
				t.Fatal(err)
			}
			// Values from scipy (SOURCES.md: lyapunov-kalman).
			for _, m := range []struct {
				name      string
				got, want mat.Matrix
			}{
				{"P", g.P, rowsDense(c.P)}, {"P⁺", g.Pplus, rowsDense(c.Pplus)}, {"S", g.S, rowsDense(c.S)},
				{"Lc", g.Lc, rowsDense(c.Lc)}, {"Lp", g.Lp, rowsDense(c.Lp)},
			} {
				if e := relErr(m.got, m.want); e > 1e-9 {
					t.Errorf("%s: relative difference from scipy %.3g > 1e-9", m.name, e)
				}
			}
			// L_p = A·L_c (SOURCES.md: kalman-forms).
			var alc mat.Dense
			alc.Mul(a, g.Lc)
			if e := relErr(g.Lp, &alc); e > 1e-14 {
				t.Errorf("Lp differs from A·Lc by %.3g", e)
			}
			// Both forms share their error poles: A(I − LcC) and (I − LcC)A
			// are similar (SOURCES.md: kalman-forms).
			pe := Eigenvalues(ErrorDynamics(a, cm, g.Lp, Prediction))
			ce := Eigenvalues(ErrorDynamics(a, cm, g.Lc, Current))
			for i := range pe {
				if d := cmplxAbs(pe[i] - ce[i]); d > 1e-10 {
					t.Errorf("error poles differ: prediction %v, current %v", pe, ce)
					break
				}
			}
		})
	}
}

func cmplxAbs(z complex128) float64 { return math.Hypot(real(z), imag(z)) }

func TestFixedGainCovarianceMatchesKalman(t *testing.T) {
	// With the Kalman gain, the fixed-gain Lyapunov equation must reproduce
	// the DARE's covariances (a consistency check, common practice).
	f := loadRiccatiFixture(t)
	for _, c := range f.Kalman {
		t.Run(c.Name, func(t *testing.T) {
			a, cm, q, r := rowsDense(c.A), rowsDense(c.C), rowsSym(c.Q), rowsSym(c.R)
			g, err := SteadyStateKalman(a, cm, q, r)
			if err != nil {
				t.Fatal(err)
			}
			p, s, pub, err := FixedGainCovariance(a, cm, g.Lp, Prediction, q, r)
			if err != nil {
				t.Fatal(err)
			}
			for _, m := range []struct {
				name      string
				got, want mat.Matrix
			}{{"prediction P", p, g.P}, {"prediction S", s, g.S}, {"prediction published", pub, g.P}} {
				if e := relErr(m.got, m.want); e > 1e-9 {
					t.Errorf("%s: relative difference from the DARE %.3g", m.name, e)
				}
			}
			p, s, pub, err = FixedGainCovariance(a, cm, g.Lc, Current, q, r)
			if err != nil {
				t.Fatal(err)
			}
			for _, m := range []struct {
				name      string
				got, want mat.Matrix
			}{{"current P⁻", p, g.P}, {"current S", s, g.S}, {"current published", pub, g.Pplus}} {
				if e := relErr(m.got, m.want); e > 1e-9 {
					t.Errorf("%s: relative difference from the DARE %.3g", m.name, e)
				}
			}
		})
	}
}

func TestFixedGainCovarianceScalar(t *testing.T) {
	// Scalar closed forms (solving the scalar Lyapunov equations by hand):
	// prediction P = (q + l²r)/(1 − (a − l)²);
	// current P⁻ = (q + a²l²r)/(1 − a²(1 − l)²), published (1 − l)²P⁻ + l²r.
	const a, l, q, r = 0.95, 0.4, 0.3, 0.2
	p, s, pub, err := FixedGainCovariance(rowsDense([][]float64{{a}}), rowsDense([][]float64{{1}}), rowsDense([][]float64{{l}}), Prediction, diagSym(q), diagSym(r))
	if err != nil {
		t.Fatal(err)
	}
	want := (q + l*l*r) / (1 - (a-l)*(a-l))
	if math.Abs(p.At(0, 0)-want) > 1e-14*want || math.Abs(s.At(0, 0)-(want+r)) > 1e-14*want || pub.At(0, 0) != p.At(0, 0) {
		t.Errorf("prediction: P = %.17g, S = %.17g, published %.17g; want P = %.17g, S = P + r", p.At(0, 0), s.At(0, 0), pub.At(0, 0), want)
	}
	p, s, pub, err = FixedGainCovariance(rowsDense([][]float64{{a}}), rowsDense([][]float64{{1}}), rowsDense([][]float64{{l}}), Current, diagSym(q), diagSym(r))
	if err != nil {
		t.Fatal(err)
	}
	want = (q + a*a*l*l*r) / (1 - a*a*(1-l)*(1-l))
	wantPub := (1-l)*(1-l)*want + l*l*r
	if math.Abs(p.At(0, 0)-want) > 1e-14*want || math.Abs(s.At(0, 0)-(want+r)) > 1e-14*want || math.Abs(pub.At(0, 0)-wantPub) > 1e-14*wantPub {
		t.Errorf("current: P⁻ = %.17g, S = %.17g, published %.17g; want %.17g, %.17g, %.17g",
			p.At(0, 0), s.At(0, 0), pub.At(0, 0), want, want+r, wantPub)
	}
	// A gain that does not stabilise (a − l = −1.05) is refused.
	if _, _, _, err := FixedGainCovariance(rowsDense([][]float64{{a}}), rowsDense([][]float64{{1}}), rowsDense([][]float64{{2}}), Prediction, diagSym(q), diagSym(r)); err == nil {
		t.Error("a destabilising gain was accepted")
	}
}

func TestSteadyStateKalmanUndetectable(t *testing.T) {
	// The mode 1.2 is unstable and C = [0, 1] does not see it: no
	// stabilising filter exists.
	a := rowsDense([][]float64{{1.2, 0}, {0, 0.5}})
	c := rowsDense([][]float64{{0, 1}})
	_, err := SteadyStateKalman(a, c, diagSym(1, 1), diagSym(1))
	if err == nil || !strings.Contains(err.Error(), "not detectable: unstable mode(s) 1.2") {
		t.Errorf("error %v, want a refusal naming the undetectable mode 1.2", err)
	}
}
