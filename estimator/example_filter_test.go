package estimator_test

import (
	"fmt"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// A current-form observer on a sampled double integrator (position
// measured), with both error poles at 0.5: L_c = [0.75, 2.5] for T = 0.1.
// The estimate starts wrong and locks onto the simulated plant.
func ExampleNewFilter() {
	const ts = 0.1
	md := &estimator.Model{
		A:  mat.NewDense(2, 2, []float64{1, ts, 0, 1}),
		B:  mat.NewDense(2, 1, []float64{ts * ts / 2, ts}),
		C:  mat.NewDense(1, 2, []float64{1, 0}),
		D:  mat.NewDense(1, 1, []float64{0}),
		Ts: ts,
	}
	set := &estimator.GainSet{Name: "placed", Form: estimator.Current, Gains: []estimator.PatternGain{{
		Outputs: estimator.FullPattern(1),
		L:       mat.NewDense(2, 1, []float64{0.75, 2.5}),
	}}}
	pr, err := estimator.Prepare(md, set, 0)
	if err != nil {
		fmt.Println(err)
		return
	}
	plant := estimator.NewPlant(md, 1, []float64{1, 0.5}) // no Q, R: no noise
	f := estimator.NewFilter(pr, nil, nil)                // starts at 0, 0

	u, y := []float64{0.2}, make([]float64, 1)
	x, xhat := make([]float64, 2), make([]float64, 2)
	for k := 0; k <= 30; k++ {
		plant.Step(u)
		plant.OutputTo(y)
		f.Step(u, y, estimator.FullPattern(1))
		if k%10 == 0 {
			plant.StateTo(x)
			f.StateTo(xhat)
			fmt.Printf("k=%2d  position %.4f (estimate %.4f)  velocity %.4f (estimate %.4f)\n", k, x[0], xhat[0], x[1], xhat[1])
		}
	}
	// The plant follows x(k) = 1 + 0.05·k + 0.001·k², v(k) = 0.5 + 0.02·k,
	// and the error e(0) = [0.25, −2] decays as e(k) = (A − L·C·A)·e(k−1):
	// e(10) = [−0.00195, −0.02393] (SOURCES.md: double-integrator-placement;
	// e(10) recomputed by closedforms.py, key example-current-observer).

	// Output:
	// k= 0  position 1.0000 (estimate 0.7500)  velocity 0.5000 (estimate 2.5000)
	// k=10  position 1.6000 (estimate 1.6020)  velocity 0.7000 (estimate 0.7239)
	// k=20  position 2.4000 (estimate 2.4000)  velocity 0.9000 (estimate 0.9000)
	// k=30  position 3.4000 (estimate 3.4000)  velocity 1.1000 (estimate 1.1000)
}
