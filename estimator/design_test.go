package estimator

import (
	"math"
	"math/cmplx"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// designDoubleIntegrator is the sampled double integrator (SOURCES.md: double-integrator):
// Φ = [[1, T], [0, 1]], Γ = [T²/2; T], white acceleration of spectral density
// qc giving Q_d = qc·[[T³/3, T²/2], [T²/2, T]]. r holds the measurement
// variances of the rows of c (nil for no noise model).
func designDoubleIntegrator(ts, qc float64, c *mat.Dense, r []float64) *Model {
	p, _ := c.Dims()
	md := &Model{
		A:  mat.NewDense(2, 2, []float64{1, ts, 0, 1}),
		B:  mat.NewDense(2, 1, []float64{ts * ts / 2, ts}),
		C:  c,
		D:  mat.NewDense(p, 1, nil),
		Ts: ts,
	}
	if r != nil {
		md.Q = mat.NewSymDense(2, []float64{qc * ts * ts * ts / 3, qc * ts * ts / 2, qc * ts * ts / 2, qc * ts})
		md.R = diagSym(r...)
	}
	return md
}

func patternsOf(gs *GainSet) []Pattern {
	out := make([]Pattern, len(gs.Gains))
	for i, g := range gs.Gains {
		out[i] = g.Outputs
	}
	return out
}

func TestDesignKalman(t *testing.T) {
	f := loadRiccatiFixture(t)
	var ref *struct {
		Name                string
		A, C, Q, R          [][]float64
		P, Pplus, S, Lc, Lp [][]float64
	}
	for i := range f.Kalman {
		if f.Kalman[i].Name == "double-integrator" {
			ref = &f.Kalman[i]
		}
	}
	if ref == nil {
		t.Fatal("fixture has no double-integrator case")
	}
	// Position and velocity measured; the fixture's case (scipy,
	// testdata/reference/riccati.py: T = 0.1, qc = 2, position variance
	// 0.01) is the position-only pattern 0b01. Velocity alone does not see
	// the position, whose mode is at 1: that pattern is undetectable and
	// left out.
	md := designDoubleIntegrator(0.1, 2, mat.NewDense(2, 2, []float64{1, 0, 0, 1}), []float64{0.01, 0.04})
	for _, form := range []Form{Prediction, Current} {
		gs, err := DesignKalman(md, form, true)
		if err != nil {
			t.Fatalf("%v: %v", form, err)
		}
		if got := patternsOf(gs); len(got) != 2 || got[0] != 0b11 || got[1] != 0b01 {
			t.Fatalf("%v: patterns %v, want [0b11 0b01]", form, got)
		}
		g := gs.Gains[1]
		wantL, wantP := ref.Lp, ref.P
		if form == Current {
			wantL, wantP = ref.Lc, ref.Pplus
		}
		for _, m := range []struct {
			name      string
			got, want mat.Matrix
		}{{"L", g.L, rowsDense(wantL)}, {"P", g.P, rowsDense(wantP)}, {"S", g.S, rowsDense(ref.S)}} {
			if e := relErr(m.got, m.want); e > 1e-9 {
				t.Errorf("%v, position only: %s differs from scipy by %.3g", form, m.name, e)
			}
		}
		// The reported poles are those of the error dynamics.
		for _, pg := range gs.Gains {
			c := OutputRows(md.C, pg.Outputs)
			want := Eigenvalues(ErrorDynamics(md.A, c, pg.L, form))
			for i := range want {
				if cmplx.Abs(pg.Poles[i]-want[i]) > 1e-12 || cmplx.Abs(pg.Poles[i]) >= 1 {
					t.Errorf("%v %b: poles %v, want %v inside the unit circle", form, pg.Outputs, pg.Poles, want)
					break
				}
			}
		}
	}
	// Without patterns only the full pattern is designed.
	gs, err := DesignKalman(md, Prediction, false)
	if err != nil || len(gs.Gains) != 1 || gs.Gains[0].Outputs != 0b11 || gs.Form != Prediction {
		t.Errorf("no patterns: %v, %v", gs, err)
	}
}

func TestDesignPlaced(t *testing.T) {
	md := designDoubleIntegrator(0.1, 2, mat.NewDense(2, 2, []float64{1, 0, 0, 1}), []float64{0.01, 0.04})
	poles := []complex128{0.5, 0.5}
	for _, tt := range []struct {
		form Form
		// Closed form for position only, T = 0.1, poles 0.5, 0.5
		// (SOURCES.md: double-integrator-placement).
		l [2]float64
	}{{Prediction, [2]float64{1, 2.5}}, {Current, [2]float64{0.75, 2.5}}} {
		gs, err := DesignPlaced(md, tt.form, poles, true)
		if err != nil {
			t.Fatalf("%v: %v", tt.form, err)
		}
		if got := patternsOf(gs); len(got) != 2 || got[0] != 0b11 || got[1] != 0b01 {
			t.Fatalf("%v: patterns %v, want [0b11 0b01] (velocity alone is unobservable)", tt.form, got)
		}
		pos := gs.Gains[1]
		for i := 0; i < 2; i++ {
			if math.Abs(pos.L.At(i, 0)-tt.l[i]) > 1e-12 {
				t.Errorf("%v, position only: L[%d] = %.15g, want %v", tt.form, i, pos.L.At(i, 0), tt.l[i])
			}
		}
		for _, pg := range gs.Gains {
			c := OutputRows(md.C, pg.Outputs)
			assertPoles(t, ErrorDynamics(md.A, c, pg.L, tt.form), poles, 1e-6)
			if pg.S == nil || pg.P == nil {
				t.Fatalf("%v %b: S or P missing although Q and R are set", tt.form, pg.Outputs)
			}
		}
		// For the prediction form P must solve
		// P = (A − LC)P(A − LC)ᵀ + Q + LRLᵀ, and S = CPCᵀ + R (SOURCES.md:
		// fixed-gain-covariance).
		if tt.form == Prediction {
			c := OutputRows(md.C, pos.Outputs)
			r := OutputCov(md.R, pos.Outputs)
			acl := ErrorDynamics(md.A, c, pos.L, Prediction)
			var rhs, lrl, res mat.Dense
			rhs.Product(acl, pos.P, acl.T())
			lrl.Product(pos.L, r, pos.L.T())
			rhs.Add(&rhs, md.Q)
			rhs.Add(&rhs, &lrl)
			res.Sub(&rhs, pos.P)
			if e := mat.Norm(&res, 2) / mat.Norm(pos.P, 2); e > 1e-12 {
				t.Errorf("P does not solve its Lyapunov equation: relative residual %.3g", e)
			}
			if got, want := pos.S.At(0, 0), pos.P.At(0, 0)+0.01; math.Abs(got-want) > 1e-14 {
				t.Errorf("S = %.17g, want C·P·Cᵀ + R = %.17g", got, want)
			}
		}
	}
	// Without a noise model S and P stay nil.
	bare := designDoubleIntegrator(0.1, 0, mat.NewDense(1, 2, []float64{1, 0}), nil)
	gs, err := DesignPlaced(bare, Prediction, poles, false)
	if err != nil {
		t.Fatal(err)
	}
	if g := gs.Gains[0]; g.S != nil || g.P != nil {
		t.Error("S and P set without Q and R")
	}
}

func TestDesignRefusals(t *testing.T) {
	decoupled := func(a2 float64) *Model {
		return &Model{
			A:  mat.NewDense(2, 2, []float64{0.5, 0, 0, a2}),
			B:  mat.NewDense(2, 1, []float64{1, 1}),
			C:  mat.NewDense(1, 2, []float64{1, 0}),
			D:  mat.NewDense(1, 1, nil),
			Ts: 1,
			Q:  diagSym(1, 1),
			R:  diagSym(1),
		}
	}
	noNoise := decoupled(0.8)
	noNoise.Q, noNoise.R = nil, nil
	tests := []struct {
		name  string
		run   func() error
		inErr string
	}{
		// The second state is not measured and does not couple to the first:
		// its mode cannot be seen (PBH test, common practice).
		{"unobservable full pattern", func() error {
			_, err := DesignPlaced(decoupled(0.8), Prediction, []complex128{0.1, 0.2}, false)
			return err
		}, "(A, C) is not observable with all outputs (the prediction form needs it): mode(s) 0.8"},
		{"undetectable Kalman", func() error {
			_, err := DesignKalman(decoupled(1.1), Current, false)
			return err
		}, "not detectable with all outputs: unstable mode(s) 1.1"},
		{"Kalman without noise", func() error {
			_, err := DesignKalman(noNoise, Prediction, false)
			return err
		}, "needs the process and measurement noise"},
		{"placed with the Kalman form", func() error {
			_, err := DesignPlaced(decoupled(0.8), Kalman, []complex128{0.1, 0.2}, false)
			return err
		}, "prediction or current"},
		{"invalid model", func() error {
			md := decoupled(0.8)
			md.Ts = 0
			_, err := DesignKalman(md, Prediction, false)
			return err
		}, "sample time"},
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
	// Detectable but not observable: the Kalman design works, the unseen
	// stable mode 0.8 stays an error pole.
	gs, err := DesignKalman(decoupled(0.8), Prediction, false)
	if err != nil {
		t.Fatalf("detectable pair refused: %v", err)
	}
	assertPoles(t, ErrorDynamics(decoupled(0.8).A, decoupled(0.8).C, gs.Gains[0].L, Prediction), []complex128{0.8, complex(0.5-gs.Gains[0].L.At(0, 0), 0)}, 1e-12)
}

func TestRuleOfThumbPoles(t *testing.T) {
	rot := func(r, th float64) *mat.Dense {
		c, s := r*math.Cos(th), r*math.Sin(th)
		return mat.NewDense(2, 2, []float64{c, -s, s, c})
	}
	tests := []struct {
		name   string
		a      *mat.Dense
		factor float64
		want   []complex128 // nil: only the general properties are checked
	}{
		// λ^factor by the rule's definition: 0.9³ = 0.729, 0.5³ = 0.125.
		{"stable real", mat.NewDense(2, 2, []float64{0.9, 0, 0, 0.5}), 3, []complex128{0.729, 0.125}},
		// 0.9·e^{±0.2i} squared is 0.81·e^{±0.4i}.
		{"complex pair", rot(0.9, 0.2), 2, []complex128{cmplx.Rect(0.81, 0.4), cmplx.Rect(0.81, -0.4)}},
		// Angle 3·1.0 rad is capped at π/2: 0.729·e^{±iπ/2}.
		{"angle capped", rot(0.9, 1.0), 3, []complex128{complex(0, 0.729), complex(0, -0.729)}},
		// A negative real eigenvalue gives the positive real |λ|^factor.
		{"negative real", mat.NewDense(1, 1, []float64{-0.5}), 2, []complex128{0.25}},
		// The integrator takes the modulus of the slowest stable mode (0.8):
		// 0.8² = 0.64, and the mode 0.8 itself also gives 0.64, so one of
		// them moves by δ = min(0.02, 0.5/2) = 0.02.
		{"integrator beside a stable mode", mat.NewDense(2, 2, []float64{1, 0.1, 0, 0.8}), 2, []complex128{0.64, 0.62}},
		// Double integrator: no stable mode, modulus 0.9 is used: 0.9⁵ =
		// 0.59049, and the repeat is moved to 0.57049.
		{"double integrator", mat.NewDense(2, 2, []float64{1, 0.1, 0, 1}), 5, []complex128{0.59049, 0.57049}},
		// Pure delays stay at 0 but are kept δ apart: 0, −0.02, −0.04.
		{"delay chain", mat.NewDense(3, 3, []float64{0, 1, 0, 0, 0, 1, 0, 0, 0}), 4, []complex128{0, -0.02, -0.04}},
		{"hot-water-like", mat.NewDense(4, 4, []float64{
			0.95, 0.03, 0, 0.01,
			0.02, 0.9, 0.05, 0,
			0, 0.04, 0.85, 0,
			0, 0, 0, 1,
		}), 5, nil},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got := RuleOfThumbPoles(tt.a, tt.factor)
			n, _ := tt.a.Dims()
			if len(got) != n {
				t.Fatalf("%d poles for %d states: %v", len(got), n, got)
			}
			if tt.want != nil {
				assertPolesList(t, got, tt.want, 1e-12)
			}
			delta := math.Min(0.02, 0.5/float64(n))
			for i, p := range got {
				if cmplx.Abs(p) >= 1 {
					t.Errorf("pole %v not inside the unit circle", p)
				}
				for _, q := range got[:i] {
					if cmplx.Abs(p-q) < delta*(1-1e-12) {
						t.Errorf("poles %v and %v closer than %v", p, q, delta)
					}
				}
			}
			// The poles are usable: they can be placed on the pair (A, C)
			// with C = [1, …, 1], which sees every mode of these plants.
			c := mat.NewDense(1, n, nil)
			for j := 0; j < n; j++ {
				c.Set(0, j, 1)
			}
			if _, err := PlaceObserver(tt.a, c, Prediction, got); err != nil {
				t.Errorf("placing the poles failed: %v", err)
			}
		})
	}
	for _, bad := range []float64{0, -1, math.NaN(), math.Inf(1)} {
		func() {
			defer func() {
				if recover() == nil {
					t.Errorf("factor %v did not panic", bad)
				}
			}()
			RuleOfThumbPoles(mat.NewDense(1, 1, []float64{0.5}), bad)
		}()
	}
}

// assertPolesList compares two multisets of poles.
func assertPolesList(t *testing.T, got, want []complex128, tol float64) {
	t.Helper()
	used := make([]bool, len(got))
	for _, w := range want {
		best, bestD := -1, math.Inf(1)
		for i, g := range got {
			if d := cmplx.Abs(g - w); !used[i] && d < bestD {
				best, bestD = i, d
			}
		}
		if best < 0 || bestD > tol {
			t.Errorf("poles %v, want %v", got, want)
			return
		}
		used[best] = true
	}
}
