package estimator

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// simModel is a 2-state, 1-input, 2-output model with a direct feedthrough
// and an operating point, to pin down the order of Plant.Step.
func simModel() *Model {
	return &Model{
		A:  mat.NewDense(2, 2, []float64{0.9, 0.1, -0.2, 0.8}),
		B:  mat.NewDense(2, 1, []float64{0.5, 1}),
		C:  mat.NewDense(2, 2, []float64{1, 0, 0.5, 1}),
		D:  mat.NewDense(2, 1, []float64{0.3, -0.1}),
		Ts: 1,
		X0: []float64{10, 20},
		U0: []float64{2},
		Y0: []float64{30, 40},
	}
}

func TestPlantNoiseFreeRecursion(t *testing.T) {
	// The plant against the model equations of model.go evaluated with
	// gonum products: x(k) = A·x(k−1) + B·(u(k−1) − U0), y(k) = Y0 + C·x(k) +
	// D·(u(k) − U0), the state starting at x0 on the first Step.
	md := simModel()
	pl := NewPlant(md, 1, []float64{11, 19})
	x := mat.NewVecDense(2, []float64{1, -1}) // deviation
	var uPrev *mat.VecDense
	got := make([]float64, 2)
	for k := 0; k < 10; k++ {
		u := []float64{2 + math.Sin(float64(k))}
		du := mat.NewVecDense(1, []float64{u[0] - 2})
		if uPrev != nil {
			var ax, bu mat.VecDense
			ax.MulVec(md.A, x)
			bu.MulVec(md.B, uPrev)
			x.AddVec(&ax, &bu)
		}
		uPrev = du
		var cx, dux mat.VecDense
		cx.MulVec(md.C, x)
		dux.MulVec(md.D, du)
		pl.Step(u)
		pl.StateTo(got)
		for i := 0; i < 2; i++ {
			if want := md.X0[i] + x.AtVec(i); math.Abs(got[i]-want) > 1e-12 {
				t.Fatalf("tick %d: x[%d] = %v, want %v", k, i, got[i], want)
			}
		}
		pl.OutputTo(got)
		for i := 0; i < 2; i++ {
			if want := md.Y0[i] + cx.AtVec(i) + dux.AtVec(i); math.Abs(got[i]-want) > 1e-12 {
				t.Fatalf("tick %d: y[%d] = %v, want %v", k, i, got[i], want)
			}
		}
	}
}

func TestPlantNoiseCovariance(t *testing.T) {
	// With A = 0 the state after each Step is the process noise just drawn,
	// and with C = 0 the output is the measurement noise: their sample
	// covariances over N draws must match Q and R within a few standard
	// errors, √((σ_ii·σ_jj + σ_ij²)/N) (common practice). Q is singular
	// (rank 1) to exercise the semidefinite factor.
	md := &Model{
		A:  mat.NewDense(2, 2, nil),
		B:  mat.NewDense(2, 1, nil),
		C:  mat.NewDense(2, 2, nil),
		D:  mat.NewDense(2, 1, nil),
		Ts: 1,
		Q:  mat.NewSymDense(2, []float64{4, 2, 2, 1}),
		R:  mat.NewSymDense(2, []float64{0.25, -0.1, -0.1, 0.5}),
	}
	const n = 20000
	pl := NewPlant(md, 7, nil)
	u := []float64{0}
	x, y := make([]float64, 2), make([]float64, 2)
	var sq, sr [2][2]float64
	pl.Step(u) // the first Step does not move the state
	for k := 0; k < n; k++ {
		pl.Step(u)
		pl.StateTo(x)
		pl.OutputTo(y)
		for i := 0; i < 2; i++ {
			for j := 0; j < 2; j++ {
				sq[i][j] += x[i] * x[j] / n
				sr[i][j] += y[i] * y[j] / n
			}
		}
	}
	for _, c := range []struct {
		name string
		got  [2][2]float64
		want *mat.SymDense
	}{{"Q", sq, md.Q}, {"R", sr, md.R}} {
		for i := 0; i < 2; i++ {
			for j := 0; j < 2; j++ {
				w := c.want.At(i, j)
				se := math.Sqrt((c.want.At(i, i)*c.want.At(j, j) + w*w) / n)
				if math.Abs(c.got[i][j]-w) > 4*se {
					t.Errorf("%s[%d,%d]: sample %v, want %v ± %v", c.name, i, j, c.got[i][j], w, 4*se)
				}
			}
		}
	}
}

func TestPlantSeed(t *testing.T) {
	md := simModel()
	md.Q = mat.NewSymDense(2, []float64{1, 0, 0, 1})
	md.R = mat.NewSymDense(2, []float64{1, 0, 0, 1})
	run := func(seed uint64) []float64 {
		pl := NewPlant(md, seed, nil)
		u := []float64{2}
		var out []float64
		y := make([]float64, 2)
		for k := 0; k < 5; k++ {
			pl.Step(u)
			pl.OutputTo(y)
			out = append(out, y...)
		}
		return out
	}
	a, b, c := run(3), run(3), run(4)
	same, differ := true, false
	for i := range a {
		same = same && a[i] == b[i]
		differ = differ || a[i] != c[i]
	}
	if !same || !differ {
		t.Errorf("seed 3 twice equal: %v; seeds 3 and 4 differ: %v", same, differ)
	}
}

func TestPlantStepAllocs(t *testing.T) {
	md := simModel()
	md.Q = mat.NewSymDense(2, []float64{1, 0, 0, 1})
	md.R = mat.NewSymDense(2, []float64{1, 0, 0, 1})
	pl := NewPlant(md, 1, nil)
	u, y := []float64{2}, make([]float64, 2)
	if a := testing.AllocsPerRun(100, func() { pl.Step(u); pl.OutputTo(y) }); a != 0 {
		t.Errorf("Plant.Step allocates %v times, want 0", a)
	}
}

func TestPlantPanics(t *testing.T) {
	tests := []struct {
		name string
		f    func()
	}{
		{"invalid model", func() { NewPlant(&Model{}, 1, nil) }},
		{"x0 length", func() { NewPlant(simModel(), 1, []float64{1}) }},
		{"u length", func() { NewPlant(simModel(), 1, nil).Step([]float64{1, 2}) }},
		{"Q indefinite", func() {
			md := simModel()
			md.Q = mat.NewSymDense(2, []float64{1, 2, 2, 1})
			NewPlant(md, 1, nil)
		}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Errorf("no panic")
				}
			}()
			tc.f()
		})
	}
}
