package estimator

import (
	"math"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// The references in this file are computed independently of filter.go:
// with gonum's Dense products and inverses, following the Kalman filter's
// equations written beside each one (SOURCES.md: kalman-filter).

// refRiccati iterates the Kalman filter's covariance recursion with gonum
// (S = C·P⁻·Cᵀ + R, K = P⁻·Cᵀ·S⁻¹, P⁺ = (I − K·C)·P⁻, P⁻ ← A·P⁺·Aᵀ + Q)
// from P⁻ = Q for iters ticks and returns the a priori and a posteriori
// covariances, S and the current-form gain K.
func refRiccati(a, c *mat.Dense, q, r mat.Symmetric, iters int) (prior, post, s, k *mat.Dense) {
	n, _ := a.Dims()
	prior = mat.DenseCopyOf(q)
	for it := 0; it < iters; it++ {
		var pct, cpct mat.Dense
		pct.Mul(prior, c.T())
		cpct.Mul(c, &pct)
		s = new(mat.Dense)
		s.Add(&cpct, r)
		var sinv mat.Dense
		if err := sinv.Inverse(s); err != nil {
			panic(err)
		}
		k = new(mat.Dense)
		k.Mul(&pct, &sinv)
		var kc, ikc mat.Dense
		kc.Mul(k, c)
		ikc.Sub(eyeDense(n), &kc)
		post = new(mat.Dense)
		post.Mul(&ikc, prior)
		var ap, apa mat.Dense
		ap.Mul(a, post)
		apa.Mul(&ap, a.T())
		prior = new(mat.Dense)
		prior.Add(&apa, q)
	}
	return prior, post, s, k
}

func eyeDense(n int) *mat.Dense {
	d := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		d.Set(i, i, 1)
	}
	return d
}

func symOf(d mat.Matrix) *mat.SymDense {
	n, _ := d.Dims()
	s := mat.NewSymDense(n, nil)
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			s.SetSym(i, j, 0.5*(d.At(i, j)+d.At(j, i)))
		}
	}
	return s
}

func mustPrepare(t testing.TB, md *Model, g *GainSet, gate float64) *Prepared {
	t.Helper()
	pr, err := Prepare(md, g, gate)
	if err != nil {
		t.Fatalf("Prepare: %v", err)
	}
	return pr
}

// diModel is the double integrator with sample time 0.1 and position
// measured, around an operating point, with a direct feedthrough to make D
// count.
func diModel() *Model {
	const ts = 0.1
	return &Model{
		A:  mat.NewDense(2, 2, []float64{1, ts, 0, 1}),
		B:  mat.NewDense(2, 1, []float64{ts * ts / 2, ts}),
		C:  mat.NewDense(1, 2, []float64{1, 0}),
		D:  mat.NewDense(1, 1, []float64{0.2}),
		Ts: ts,
		X0: []float64{5, -1},
		U0: []float64{0.5},
		Y0: []float64{3},
	}
}

// threeModel is a 3-state, 1-input, 2-output model with noise.
func threeModel() *Model {
	return &Model{
		A: mat.NewDense(3, 3, []float64{
			0.9, 0.2, 0,
			0, 0.8, 0.1,
			0, 0, 0.95,
		}),
		B:  mat.NewDense(3, 1, []float64{0, 0.5, 1}),
		C:  mat.NewDense(2, 3, []float64{1, 0, 0, 0, 0, 1}),
		D:  mat.NewDense(2, 1, nil),
		Ts: 1,
		X0: []float64{20, 1, -3},
		U0: []float64{10},
		Y0: []float64{20, -3},
		Q:  mat.NewSymDense(3, []float64{0.01, 0.002, 0, 0.002, 0.02, 0, 0, 0, 0.005}),
		R:  mat.NewSymDense(2, []float64{0.1, 0.01, 0.01, 0.2}),
	}
}

func TestKalmanScalarRandomWalk(t *testing.T) {
	// A = C = 1, q = r = 1: the steady-state gain is K = 0.6180339887 and
	// P⁻ = 1.6180339887 (SOURCES.md: random-walk-riccati); the a
	// posteriori P = (1 − K)·P⁻ = K·r = 0.6180339887 and S = P⁻ + r.
	md := &Model{
		A: mat.NewDense(1, 1, []float64{1}), B: mat.NewDense(1, 1, []float64{0}),
		C: mat.NewDense(1, 1, []float64{1}), D: mat.NewDense(1, 1, []float64{0}),
		Ts: 1,
		Q:  mat.NewSymDense(1, []float64{1}), R: mat.NewSymDense(1, []float64{1}),
	}
	pr := mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0)
	f := NewFilter(pr, []float64{0}, mat.NewSymDense(1, []float64{100}))
	u, y := []float64{0}, []float64{0}
	for k := 0; k < 60; k++ {
		f.Step(u, y, 1)
	}
	const wantK, wantPrior = 0.6180339887, 1.6180339887
	var p mat.SymDense
	if !f.CovarianceTo(&p) || math.Abs(p.At(0, 0)-wantK) > 1e-9 {
		t.Errorf("a posteriori P = %v, want %v", p.At(0, 0), wantK)
	}
	// One more tick with an innovation of exactly 1 moves the estimate by K.
	x := make([]float64, 1)
	f.StateTo(x)
	before := x[0]
	y[0] = before + 1
	out := f.Step(u, y, 1)
	f.StateTo(x)
	if got := x[0] - before; math.Abs(got-wantK) > 1e-9 {
		t.Errorf("gain = %v, want %v", got, wantK)
	}
	sv := make([]float64, 1)
	f.InnovationVarTo(sv)
	if math.Abs(sv[0]-(wantPrior+1)) > 1e-9 {
		t.Errorf("S = %v, want P⁻ + r = %v", sv[0], wantPrior+1)
	}
	if !out.Corrected || !out.HasNIS || out.Dof != 1 || math.Abs(out.NIS-1/(wantPrior+1)) > 1e-9 {
		t.Errorf("outcome %+v, want corrected, NIS = 1/S = %v", out, 1/(wantPrior+1))
	}
}

func TestKalmanConvergesToSteadyState(t *testing.T) {
	// The time-varying filter's covariance, started far from it, converges
	// to the steady-state Kalman filter's: P(k|k−1) → P and P(k|k) → P⁺ of
	// SteadyStateKalman (solved there by a different method, a DARE), and
	// NewFilter without p0 starts there already.
	md := threeModel()
	ss, err := SteadyStateKalman(md.A, md.C, md.Q, md.R)
	if err != nil {
		t.Fatal(err)
	}
	pr := mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0)
	f := NewFilter(pr, nil, mat.NewSymDense(3, []float64{100, 0, 0, 0, 100, 0, 0, 0, 100}))
	u, y := []float64{10}, []float64{20, -3}
	var p mat.SymDense
	near := func(what string, got, want mat.Matrix) {
		t.Helper()
		if d := maxAbsDiffFlat(got, want); d > 1e-10 {
			t.Errorf("%s: differs from SteadyStateKalman by %v", what, d)
		}
	}
	for k := 0; k < 400; k++ {
		f.Step(u, y, 3)
	}
	f.CovarianceTo(&p)
	near("P(k|k)", &p, ss.Pplus)
	f.Step(u, y, 0) // predict only: P(k+1|k)
	f.CovarianceTo(&p)
	near("P(k+1|k)", &p, ss.P)
	g := NewFilter(pr, nil, nil)
	g.CovarianceTo(&p)
	near("NewFilter's P", &p, ss.P)
	sv := make([]float64, 2)
	g.Step(u, y, 3)
	g.InnovationVarTo(sv)
	if math.Abs(sv[0]-ss.S.At(0, 0)) > 1e-12 || math.Abs(sv[1]-ss.S.At(1, 1)) > 1e-12 {
		t.Errorf("S_ii = %v, want diag of SteadyStateKalman's S", sv)
	}
}

func maxAbsDiffFlat(a, b mat.Matrix) float64 {
	r, c := a.Dims()
	d := 0.0
	for i := 0; i < r; i++ {
		for j := 0; j < c; j++ {
			d = math.Max(d, math.Abs(a.At(i, j)-b.At(i, j)))
		}
	}
	return d
}

func TestPredictionFormRecursion(t *testing.T) {
	// The prediction-form observer x̂(k+1|k) = A·x̂(k|k−1) + B·u(k) +
	// L·(y(k) − C·x̂(k|k−1) − D·u(k)) (gains.go), with L_p = [1, 2.5]
	// placing both poles at 0.5 (SOURCES.md: double-integrator-placement), over 10
	// ticks against the same recursion written with gonum.
	md := diModel()
	l := mat.NewDense(2, 1, []float64{1, 2.5})
	pr := mustPrepare(t, md, &GainSet{Name: "p", Form: Prediction, Gains: []PatternGain{{
		Outputs: 1, L: l, S: mat.NewSymDense(1, []float64{2}),
	}}}, 0)
	x0 := []float64{5.3, -0.8}
	f := NewFilter(pr, x0, nil)

	xhat := mat.NewVecDense(2, []float64{x0[0] - 5, x0[1] + 1}) // x̂(0|−1), deviation
	got := make([]float64, 2)
	yhat := make([]float64, 1)
	for k := 0; k < 10; k++ {
		u := []float64{0.5 + math.Cos(0.7*float64(k))}
		y := []float64{3 + 0.4*float64(k) - 0.05*float64(k*k)}
		out := f.Step(u, y, 1)

		// After Step k the filter publishes x̂(k|k−1).
		f.StateTo(got)
		for i := 0; i < 2; i++ {
			if want := md.X0[i] + xhat.AtVec(i); math.Abs(got[i]-want) > 1e-12 {
				t.Fatalf("tick %d: x̂[%d] = %.15g, want %.15g", k, i, got[i], want)
			}
		}
		du := mat.NewVecDense(1, []float64{u[0] - 0.5})
		var cx, dux mat.VecDense
		cx.MulVec(md.C, xhat)
		dux.MulVec(md.D, du)
		pred := 3 + cx.AtVec(0) + dux.AtVec(0)
		f.PredictedOutputTo(yhat)
		if math.Abs(yhat[0]-pred) > 1e-12 {
			t.Fatalf("tick %d: ŷ = %v, want %v", k, yhat[0], pred)
		}
		r := y[0] - pred
		if !out.HasNIS || math.Abs(out.NIS-r*r/2) > 1e-12 {
			t.Fatalf("tick %d: NIS = %v, want r²/S = %v", k, out.NIS, r*r/2)
		}
		var ax, bu, lr mat.VecDense
		ax.MulVec(md.A, xhat)
		bu.MulVec(md.B, du)
		lr.ScaleVec(r, l.ColView(0))
		xhat.AddVec(&ax, &bu)
		xhat.AddVec(xhat, &lr)
	}
}

func TestCurrentAndPredictionForms(t *testing.T) {
	// With L_p = A·L_c the two forms are the same observer: x̂_pred(k+1|k) =
	// A·x̂_cur(k|k) + B·u(k) (SOURCES.md: kalman-forms). L_c = [0.75, 2.5]
	// places both current-form poles at 0.5 (SOURCES.md: double-integrator-placement).
	md := diModel()
	lc := mat.NewDense(2, 1, []float64{0.75, 2.5})
	var lp mat.Dense
	lp.Mul(md.A, lc)
	cur := NewFilter(mustPrepare(t, md, &GainSet{Name: "c", Form: Current,
		Gains: []PatternGain{{Outputs: 1, L: lc}}}, 0), nil, nil)
	pred := NewFilter(mustPrepare(t, md, &GainSet{Name: "p", Form: Prediction,
		Gains: []PatternGain{{Outputs: 1, L: &lp}}}, 0), nil, nil)
	xc, xp := make([]float64, 2), make([]float64, 2)
	var prevC []float64
	var prevU float64
	for k := 0; k < 30; k++ {
		u := []float64{0.5 + math.Sin(0.3*float64(k))}
		y := []float64{3 + math.Sin(0.1*float64(k)) + 0.1*math.Cos(2.1*float64(k))}
		cur.Step(u, y, 1)
		pred.Step(u, y, 1)
		pred.StateTo(xp)
		if prevC != nil {
			// A·x̂_cur(k−1|k−1) + B·(u(k−1) − U0), in deviations.
			for i := 0; i < 2; i++ {
				want := md.X0[i] + md.A.At(i, 0)*(prevC[0]-md.X0[0]) + md.A.At(i, 1)*(prevC[1]-md.X0[1]) +
					md.B.At(i, 0)*(prevU-md.U0[0])
				if math.Abs(xp[i]-want) > 1e-11 {
					t.Fatalf("tick %d: x̂_pred[%d] = %.15g, want A·x̂_cur + B·u = %.15g", k, i, xp[i], want)
				}
			}
		}
		cur.StateTo(xc)
		prevC = append(prevC[:0], xc...)
		prevU = u[0]
	}
}

func TestJosephCovarianceBadlyScaled(t *testing.T) {
	// A well-behaved 3-state model seen through the state scaling
	// T = diag(1e-3, 1, 1e3): A' = T·A·T⁻¹, C' = C·T⁻¹, Q' = T·Q·Tᵀ, and
	// outputs of very different sizes. Over 10,000 ticks, with outputs
	// dropping in and out, the Joseph form (SOURCES.md: kalman-forms)
	// keeps P exactly symmetric and positive semidefinite (its correlation
	// matrix has no negative eigenvalue beyond rounding); after a final run
	// with all outputs it matches the Riccati recursion computed with gonum.
	base := threeModel()
	tsc := []float64{1e-3, 1, 1e3}
	var a, c mat.Dense
	a.Apply(func(i, j int, v float64) float64 { return v * tsc[i] / tsc[j] }, base.A)
	c.Apply(func(i, j int, v float64) float64 { return v / tsc[j] }, base.C)
	q := mat.NewSymDense(3, nil)
	for i := 0; i < 3; i++ {
		for j := i; j < 3; j++ {
			q.SetSym(i, j, base.Q.At(i, j)*tsc[i]*tsc[j])
		}
	}
	r := mat.NewSymDense(2, []float64{1e-8, 0, 0, 1e6})
	c.Set(1, 2, c.At(1, 2)*1e3) // output 1 is 1000 times larger: R scaled by 1e6
	md := &Model{A: &a, B: mat.NewDense(3, 1, []float64{0, 0.5, 1000}), C: &c,
		D: mat.NewDense(2, 1, nil), Ts: 1, Q: q, R: r}
	pr := mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0)
	f := NewFilter(pr, nil, q)
	pl := NewPlant(md, 11, nil)
	u, y := []float64{0}, make([]float64, 2)
	var p mat.SymDense
	patterns := []Pattern{3, 3, 1, 3, 2, 0, 3}
	for k := 0; k < 10000; k++ {
		u[0] = math.Sin(0.01 * float64(k))
		pl.Step(u)
		pl.OutputTo(y)
		pat := Pattern(3)
		if k < 9800 {
			pat = patterns[k%len(patterns)]
		}
		f.Step(u, y, pat)
		if k%97 != 0 && k != 9999 {
			continue
		}
		f.CovarianceTo(&p)
		corr := mat.NewSymDense(3, nil)
		for i := 0; i < 3; i++ {
			for j := 0; j < 3; j++ {
				if p.At(i, j) != p.At(j, i) {
					t.Fatalf("tick %d: P[%d,%d] = %v ≠ P[%d,%d] = %v", k, i, j, p.At(i, j), j, i, p.At(j, i))
				}
			}
			for j := i; j < 3; j++ {
				corr.SetSym(i, j, p.At(i, j)/math.Sqrt(p.At(i, i)*p.At(j, j)))
			}
		}
		var es mat.EigenSym
		if !es.Factorize(corr, false) {
			t.Fatalf("tick %d: eigenvalues of the correlation matrix did not converge", k)
		}
		if lo := es.Values(nil)[0]; lo < -1e-9 {
			t.Fatalf("tick %d: P has a negative eigenvalue %v (correlation scale)", k, lo)
		}
	}
	_, post, _, _ := refRiccati(&a, &c, q, r, 500)
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			scale := math.Sqrt(post.At(i, i) * post.At(j, j))
			if d := math.Abs(p.At(i, j)-post.At(i, j)) / scale; d > 1e-6 {
				t.Errorf("P[%d,%d] = %v, want the Riccati value %v (scaled difference %v)", i, j, p.At(i, j), post.At(i, j), d)
			}
		}
	}
}

func TestMissingOutputs(t *testing.T) {
	// Fixed gains are valid only for the outputs they were designed with
	// (Filter.Step): a missing output means predict only, unless the set has
	// a gain for the outputs present. The Kalman form corrects with any
	// subset; its gain for output 0 alone is K = P⁻·c₀ᵀ/(c₀·P⁻·c₀ᵀ + r₀₀)
	// (the Kalman gain for the rows present, SOURCES.md: kalman-filter),
	// computed here with gonum.
	md := threeModel()
	_, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	full := PatternGain{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)}
	l0 := mat.NewDense(3, 1, []float64{0.5, 0.1, 0.05})
	only0 := PatternGain{Outputs: 1, L: l0}
	u := []float64{10}
	y := []float64{21, math.NaN()}
	x0 := []float64{20.5, 1.2, -2.9}

	t.Run("full pattern only", func(t *testing.T) {
		f := NewFilter(mustPrepare(t, md, &GainSet{Name: "g", Form: Current, Gains: []PatternGain{full}}, 0), x0, nil)
		out := f.Step(u, y, 1)
		if !out.NoGain || out.Corrected || out.Used != 1 || out.HasNIS {
			t.Errorf("outcome %+v, want NoGain, not corrected, Used 1", out)
		}
		got := make([]float64, 3)
		f.StateTo(got)
		for i := range got {
			if got[i] != x0[i] {
				t.Errorf("x̂[%d] = %v, want the first tick's prediction %v", i, got[i], x0[i])
			}
		}
		r := make([]float64, 2)
		f.InnovationTo(r)
		if r[0] != 0.5 || !math.IsNaN(r[1]) {
			t.Errorf("innovation %v, want [0.5 NaN]", r)
		}
	})
	t.Run("per-pattern gain", func(t *testing.T) {
		f := NewFilter(mustPrepare(t, md, &GainSet{Name: "g", Form: Current, Gains: []PatternGain{full, only0}}, 0), x0, nil)
		out := f.Step(u, y, 1)
		if out.NoGain || !out.Corrected || out.Used != 1 {
			t.Errorf("outcome %+v, want corrected with Used 1", out)
		}
		got := make([]float64, 3)
		f.StateTo(got)
		for i := range got {
			if want := x0[i] + l0.At(i, 0)*0.5; math.Abs(got[i]-want) > 1e-14 {
				t.Errorf("x̂[%d] = %v, want x̂⁻ + L·r = %v", i, got[i], want)
			}
		}
		// The full pattern still uses the full gain.
		out = f.Step(u, []float64{20, -3}, 3)
		if !out.Corrected || out.Used != 3 || !out.HasNIS || out.Dof != 2 {
			t.Errorf("outcome %+v, want corrected with both outputs", out)
		}
	})
	t.Run("kalman subset", func(t *testing.T) {
		p0 := md.Q
		f := NewFilter(mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0), x0, p0)
		out := f.Step(u, y, 1)
		if out.NoGain || !out.Corrected || out.Used != 1 || out.Dof != 1 {
			t.Errorf("outcome %+v, want corrected with Used 1", out)
		}
		c0 := md.C.RawRowView(0)
		var pc mat.VecDense
		pc.MulVec(p0, mat.NewVecDense(3, c0))
		s0 := mat.Dot(mat.NewVecDense(3, c0), &pc) + md.R.At(0, 0)
		got := make([]float64, 3)
		f.StateTo(got)
		for i := range got {
			if want := x0[i] + pc.AtVec(i)/s0*0.5; math.Abs(got[i]-want) > 1e-14 {
				t.Errorf("x̂[%d] = %v, want %v", i, got[i], want)
			}
		}
		if math.Abs(out.NIS-0.25/s0) > 1e-14 {
			t.Errorf("NIS = %v, want r²/S = %v", out.NIS, 0.25/s0)
		}
		// Nothing present: predict only, no NIS.
		out = f.Step(u, y, 0)
		if out.Corrected || out.HasNIS || out.Used != 0 || out.NoGain {
			t.Errorf("no outputs: outcome %+v", out)
		}
	})
	t.Run("NaN in a present output is absent", func(t *testing.T) {
		f := NewFilter(mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0), x0, md.Q)
		out := f.Step(u, y, 3)
		if out.Used != 1 || out.Outliers != 0 {
			t.Errorf("outcome %+v, want Used 1 and no outliers", out)
		}
	})
}

func TestStepAllocs(t *testing.T) {
	md := threeModel()
	prior, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	var lp mat.Dense
	lp.Mul(md.A, kc)
	sets := []*GainSet{
		{Name: "prediction", Form: Prediction, Gains: []PatternGain{{Outputs: 3, L: &lp, S: symOf(s), P: symOf(prior)}}},
		{Name: "current", Form: Current, Gains: []PatternGain{
			{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)},
			{Outputs: 1, L: mat.NewDense(3, 1, []float64{0.5, 0.1, 0}), S: mat.NewSymDense(1, []float64{s.At(0, 0)})},
		}},
		{Name: "kalman", Form: Kalman},
	}
	for _, g := range sets {
		t.Run(g.Name, func(t *testing.T) {
			f := NewFilter(mustPrepare(t, md, g, 0.999), nil, nil)
			pl := NewPlant(md, 1, nil)
			u, y := []float64{10}, make([]float64, 2)
			x, sd, r := make([]float64, 3), make([]float64, 3), make([]float64, 2)
			var cov mat.SymDense
			f.CovarianceTo(&cov)
			k := 0
			allocs := testing.AllocsPerRun(500, func() {
				pl.Step(u)
				pl.OutputTo(y)
				if k%5 == 0 {
					y[1] += 100 // an outlier
				}
				f.Step(u, y, Pattern(1+k%3))
				k++
				f.StateTo(x)
				f.StdTo(sd)
				f.InnovationTo(r)
				f.InnovationVarTo(r)
				f.PredictedOutputTo(r)
				f.CovarianceTo(&cov)
			})
			if allocs != 0 {
				t.Errorf("Step and read-outs allocate %v times per tick, want 0", allocs)
			}
		})
	}
}

func TestUse(t *testing.T) {
	md := threeModel()
	prior, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	cur := mustPrepare(t, md, &GainSet{Name: "cur", Form: Current,
		Gains: []PatternGain{{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)}}}, 0)
	var lp mat.Dense
	lp.Mul(md.A, kc)
	pred := mustPrepare(t, md, &GainSet{Name: "pred", Form: Prediction,
		Gains: []PatternGain{{Outputs: 3, L: &lp, S: symOf(s), P: symOf(prior)}}}, 0)
	kf := mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0)
	p0 := mat.NewSymDense(3, []float64{1, 0, 0, 0, 2, 0, 0, 0, 3})

	t.Run("state carries over", func(t *testing.T) {
		// Switching between the prediction form and the current form with
		// L_p = A·L_c must not change the estimates at all: the pending
		// prediction-form correction enters the next prediction.
		ref := NewFilter(cur, nil, nil)
		f := NewFilter(cur, nil, nil)
		pl := NewPlant(md, 3, nil)
		u, y := []float64{10}, make([]float64, 2)
		xr, xf := make([]float64, 3), make([]float64, 3)
		for k := 0; k < 40; k++ {
			pl.Step(u)
			pl.OutputTo(y)
			if k == 10 {
				f.Use(pred)
			}
			if k == 20 {
				f.Use(cur)
			}
			ref.Step(u, y, 3)
			f.Step(u, y, 3)
			if k >= 10 && k < 20 {
				continue // f publishes x̂(k|k−1) meanwhile
			}
			ref.StateTo(xr)
			f.StateTo(xf)
			for i := range xr {
				if math.Abs(xr[i]-xf[i]) > 1e-12 {
					t.Fatalf("tick %d: x̂[%d] = %v, want %v", k, i, xf[i], xr[i])
				}
			}
		}
		if f.Prepared() != cur {
			t.Errorf("Prepared() is not the set in use")
		}
	})
	t.Run("covariance", func(t *testing.T) {
		f := NewFilter(cur, nil, p0)
		var p mat.SymDense
		u, y := []float64{10}, []float64{20, -3}
		f.Step(u, y, 3)
		var before mat.SymDense
		f.CovarianceTo(&before)
		f.Use(kf) // fixed (tracked: the model has Q and R) → Kalman: P carries over
		if !f.CovarianceTo(&p) || !mat.Equal(&p, &before) {
			t.Errorf("after fixed → Kalman, P = %v, want the fixed gain's own %v", mat.Formatted(&p), mat.Formatted(&before))
		}
		f.Step(u, y, 3)
		f.CovarianceTo(&p)
		kept := p.At(2, 2)
		kf2 := mustPrepare(t, md, &GainSet{Name: "kf2", Form: Kalman}, 0.99)
		f.Use(kf2) // Kalman → Kalman keeps P
		f.CovarianceTo(&p)
		if p.At(2, 2) != kept {
			t.Errorf("after Kalman → Kalman, P[2,2] = %v, want %v", p.At(2, 2), kept)
		}
		f.Use(cur) // tracked fixed gains carry the covariance on
		f.CovarianceTo(&p)
		if p.At(2, 2) != kept {
			t.Errorf("Kalman → fixed gains: P[2,2] = %v, want %v", p.At(2, 2), kept)
		}
		// Without Q and R in the model, fixed gains report their stored P.
		bare := threeModel()
		bare.Q, bare.R = nil, nil
		g := NewFilter(mustPrepare(t, bare, &GainSet{Name: "cur", Form: Current,
			Gains: []PatternGain{{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)}}}, 0), nil, p0)
		g.CovarianceTo(&p)
		if p.At(0, 0) != post.At(0, 0) {
			t.Errorf("fixed gains without noise: P[0,0] = %v, want the stored %v", p.At(0, 0), post.At(0, 0))
		}
	})
	t.Run("no steady state: p0, else 10·Q", func(t *testing.T) {
		// The mode at 1 is not excited by Q, so no stabilising steady-state
		// filter exists (SteadyStateKalman refuses), while a fixed gain
		// still makes the error dynamics diag(0.5, 0.25) stable.
		md := &Model{
			A: mat.NewDense(2, 2, []float64{1, 0, 0, 0.5}), B: mat.NewDense(2, 1, nil),
			C: mat.NewDense(2, 2, []float64{1, 0, 0, 1}), D: mat.NewDense(2, 1, nil), Ts: 1,
			Q: mat.NewSymDense(2, []float64{0, 0, 0, 1}), R: mat.NewSymDense(2, []float64{1, 0, 0, 1}),
		}
		if _, err := SteadyStateKalman(md.A, md.C, md.Q, md.R); err == nil {
			t.Fatal("SteadyStateKalman found a steady state; the test needs a model without one")
		}
		fixed := mustPrepare(t, md, &GainSet{Name: "fixed", Form: Current,
			Gains: []PatternGain{{Outputs: 3, L: mat.NewDense(2, 2, []float64{0.5, 0, 0, 0.5})}}}, 0)
		kf := mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0)
		p0 := mat.NewSymDense(2, []float64{3, 0, 0, 4})
		var p mat.SymDense
		f := NewFilter(fixed, nil, p0)
		f.Use(kf)
		if f.CovarianceTo(&p); !mat.Equal(&p, p0) {
			t.Errorf("fixed → Kalman: P = %v, want p0", mat.Formatted(&p))
		}
		g := NewFilter(kf, nil, nil)
		want := mat.NewSymDense(2, []float64{0, 0, 0, 10})
		if g.CovarianceTo(&p); !mat.Equal(&p, want) {
			t.Errorf("Kalman without p0: P = %v, want 10·Q", mat.Formatted(&p))
		}
	})
	t.Run("allocation-free", func(t *testing.T) {
		f := NewFilter(cur, nil, p0)
		i := 0
		sets := []*Prepared{pred, kf, cur}
		if a := testing.AllocsPerRun(50, func() { f.Use(sets[i%3]); i++ }); a != 0 {
			t.Errorf("Use allocates %v times, want 0", a)
		}
	})
	t.Run("same model by value", func(t *testing.T) {
		f := NewFilter(cur, nil, nil)
		other := threeModel() // equal, another pointer
		f.Use(mustPrepare(t, other, &GainSet{Name: "kf", Form: Kalman}, 0))
	})
	t.Run("different model panics", func(t *testing.T) {
		other := threeModel()
		other.A.Set(0, 0, 0.5)
		o := mustPrepare(t, other, &GainSet{Name: "kf", Form: Kalman}, 0)
		f := NewFilter(cur, nil, nil)
		defer func() {
			if recover() == nil {
				t.Error("Use with another model did not panic")
			}
		}()
		f.Use(o)
	})
}

func TestResetAndReadouts(t *testing.T) {
	md := threeModel()
	_, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	pr := mustPrepare(t, md, &GainSet{Name: "cur", Form: Current,
		Gains: []PatternGain{{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)}}}, 0)
	f := NewFilter(pr, nil, nil)
	x, sd := make([]float64, 3), make([]float64, 3)
	r, rv, yh := make([]float64, 2), make([]float64, 2), make([]float64, 2)

	// Before any tick: the operating point, no innovations.
	f.StateTo(x)
	f.InnovationTo(r)
	f.PredictedOutputTo(yh)
	if x[0] != 20 || x[1] != 1 || x[2] != -3 || !math.IsNaN(r[0]) || yh[0] != 20 || yh[1] != -3 {
		t.Errorf("fresh filter: x %v, r %v, ŷ %v", x, r, yh)
	}
	// Fixed gains started without an initial covariance start settled: the
	// standard deviation is the full-pattern steady state, the stored P
	// (computed from the model's noise, so equal to rounding).
	near := func(a, b float64) bool { return math.Abs(a-b) <= 1e-9*math.Abs(b) }
	if !f.StdTo(sd) || !near(sd[1], math.Sqrt(post.At(1, 1))) {
		t.Errorf("StdTo = %v, want √diag of the stored P", sd)
	}
	out := f.Step([]float64{10}, []float64{21, -3}, 3)
	f.InnovationTo(r)
	f.InnovationVarTo(rv)
	if r[0] != 1 || r[1] != 0 || !near(rv[0], s.At(0, 0)) || !near(rv[1], s.At(1, 1)) || !out.Corrected {
		t.Errorf("innovation %v, variance %v, want [1 0] and diag S", r, rv)
	}
	f.Reset([]float64{21, 1, -3}, nil)
	f.StateTo(x)
	f.InnovationTo(r)
	if x[0] != 21 || !math.IsNaN(r[0]) {
		t.Errorf("after Reset: x %v, innovation %v", x, r)
	}
	// A set without S or P, for a model without noise: no NIS, no standard
	// deviation.
	noiseless := threeModel()
	noiseless.Q, noiseless.R = nil, nil
	bare := mustPrepare(t, noiseless, &GainSet{Name: "bare", Form: Current, Gains: []PatternGain{{Outputs: 3, L: kc}}}, 0.999)
	g := NewFilter(bare, nil, nil)
	out = g.Step([]float64{10}, []float64{1000, -3}, 3)
	g.InnovationVarTo(rv)
	var cov mat.SymDense
	if out.HasNIS || out.Outliers != 0 || !out.Corrected || g.StdTo(sd) || !math.IsNaN(sd[0]) ||
		!math.IsNaN(rv[0]) || g.CovarianceTo(&cov) {
		t.Errorf("no S, no P: outcome %+v, std %v, S_ii %v", out, sd, rv)
	}
}

func TestPrepareErrors(t *testing.T) {
	md := threeModel()
	_, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	good := func() PatternGain { return PatternGain{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)} }
	mod := func(f func(g *PatternGain)) *GainSet {
		g := good()
		f(&g)
		return &GainSet{Name: "g", Form: Current, Gains: []PatternGain{g}}
	}
	tests := []struct {
		name string
		set  *GainSet
		gate float64
		want string
	}{
		{"unknown form", &GainSet{Name: "g", Form: 7}, 0, "form 7"},
		{"no gains", &GainSet{Name: "g", Form: Current}, 0, "without gains"},
		{"gate", &GainSet{Name: "g", Form: Kalman}, 1, "gate probability"},
		{"L shape", mod(func(g *PatternGain) { g.L = mat.NewDense(3, 1, nil) }), 0, "L is 3×1"},
		{"L NaN", mod(func(g *PatternGain) { l := mat.DenseCopyOf(kc); l.Set(1, 1, math.NaN()); g.L = l }), 0, "NaN"},
		{"pattern range", mod(func(g *PatternGain) { g.Outputs = 7 }), 0, "beyond"},
		{"first not full", &GainSet{Name: "g", Form: Current, Gains: []PatternGain{{Outputs: 1, L: mat.NewDense(3, 1, nil)}}}, 0, "first gain"},
		{"duplicate", &GainSet{Name: "g", Form: Current, Gains: []PatternGain{good(), good()}}, 0, "twice"},
		{"unstable", mod(func(g *PatternGain) { g.L = mat.NewDense(3, 2, []float64{3, 0, 0, 0, 0, 0}) }), 0, "unit circle"},
		{"S shape", mod(func(g *PatternGain) { g.S = mat.NewSymDense(1, []float64{1}) }), 0, "S is 1×1"},
		{"S indefinite", mod(func(g *PatternGain) { g.S = mat.NewSymDense(2, []float64{1, 2, 2, 1}) }), 0, "positive definite"},
		{"P shape", mod(func(g *PatternGain) { g.P = mat.NewSymDense(2, nil) }), 0, "P is 2×2"},
		{"P negative", mod(func(g *PatternGain) { g.P = mat.NewSymDense(3, []float64{1, 0, 0, 0, -1, 0, 0, 0, 1}) }), 0, "negative"},
		{"kalman with gains", &GainSet{Name: "g", Form: Kalman, Gains: []PatternGain{good()}}, 0, "not fixed gains"},
		{"kalman R shape", &GainSet{Name: "g", Form: Kalman, R: mat.NewSymDense(1, []float64{1})}, 0, "R is 1×1"},
		{"kalman R singular", &GainSet{Name: "g", Form: Kalman, R: mat.NewSymDense(2, []float64{1, 1, 1, 1})}, 0, "R is not positive definite"},
		{"kalman Q indefinite", &GainSet{Name: "g", Form: Kalman, Q: mat.NewSymDense(3, []float64{1, 0, 0, 0, -1, 0, 0, 0, 1})}, 0, "semidefinite"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := Prepare(md, tc.set, tc.gate)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("Prepare error %v, want one containing %q", err, tc.want)
			}
		})
	}
	t.Run("kalman without noise", func(t *testing.T) {
		bare := threeModel()
		bare.Q, bare.R = nil, nil
		if _, err := Prepare(bare, &GainSet{Name: "g", Form: Kalman}, 0); err == nil {
			t.Error("Prepare accepted a Kalman set without Q and R")
		}
	})
	t.Run("good", func(t *testing.T) {
		pr, err := Prepare(md, &GainSet{Name: "g", Form: Current, Gains: []PatternGain{good()}}, 0.999)
		if err != nil {
			t.Fatal(err)
		}
		if pr.Form() != Current || pr.Model() != md || pr.Set().Name != "g" || pr.Gate() != 0.999 {
			t.Errorf("accessors: %v %v %v %v", pr.Form(), pr.Model() == md, pr.Set().Name, pr.Gate())
		}
	})
}

func TestFilterPanics(t *testing.T) {
	md := threeModel()
	pr := mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0)
	tests := []struct {
		name string
		f    func()
	}{
		{"x0 length", func() { NewFilter(pr, []float64{1}, nil) }},
		{"p0 size", func() { NewFilter(pr, nil, mat.NewSymDense(2, nil)) }},
		{"u length", func() { NewFilter(pr, nil, nil).Step([]float64{1, 2}, []float64{1, 2}, 3) }},
		{"y length", func() { NewFilter(pr, nil, nil).Step([]float64{1}, []float64{1}, 3) }},
		{"StateTo length", func() { NewFilter(pr, nil, nil).StateTo(make([]float64, 2)) }},
		{"InnovationTo length", func() { NewFilter(pr, nil, nil).InnovationTo(make([]float64, 3)) }},
		{"CovarianceTo size", func() { NewFilter(pr, nil, nil).CovarianceTo(mat.NewSymDense(2, nil)) }},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Error("no panic")
				}
			}()
			tc.f()
		})
	}
}
