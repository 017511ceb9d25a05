package estimator_test

import (
	"fmt"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// A steady-state Kalman design for a double integrator sampled at
// T = 0.1 s, driven by white acceleration of spectral density 2 and with
// both position (variance 0.01) and velocity (variance 0.04) measured. With
// patterns, a gain is also designed for the position alone; the velocity
// alone cannot locate the position, so it gets none.
func ExampleDesignKalman() {
	const ts, qc = 0.1, 2.0
	md := &estimator.Model{
		A:  mat.NewDense(2, 2, []float64{1, ts, 0, 1}),
		B:  mat.NewDense(2, 1, []float64{ts * ts / 2, ts}),
		C:  mat.NewDense(2, 2, []float64{1, 0, 0, 1}),
		D:  mat.NewDense(2, 1, nil),
		Ts: ts,
		Q: mat.NewSymDense(2, []float64{
			qc * ts * ts * ts / 3, qc * ts * ts / 2,
			qc * ts * ts / 2, qc * ts,
		}),
		R:       mat.NewSymDense(2, []float64{0.01, 0, 0, 0.04}),
		Outputs: []estimator.Signal{{Name: "position", Unit: "m"}, {Name: "velocity", Unit: "m/s"}},
	}
	gs, err := estimator.DesignKalman(md, estimator.Current, true)
	if err != nil {
		fmt.Println(err)
		return
	}
	for _, g := range gs.Gains {
		fmt.Printf("outputs %02b:\nL = %.4f\nP = %.5f\npoles %.4f\n", uint64(g.Outputs),
			mat.Formatted(g.L, mat.Prefix("    ")), mat.Formatted(g.P, mat.Prefix("    ")), g.Poles)
	}
	// Output:
	// outputs 11:
	// L = ⎡0.2034  0.0440⎤
	//     ⎣0.1762  0.8441⎦
	// P = ⎡0.00203  0.00176⎤
	//     ⎣0.00176  0.03377⎦
	// poles [(0.7869+0.0000i) (0.1479+0.0000i)]
	// outputs 01:
	// L = ⎡0.6116⎤
	//     ⎣2.7872⎦
	// P = ⎡0.00612  0.02787⎤
	//     ⎣0.02787  0.33885⎦
	// poles [(0.5549+0.2838i) (0.5549-0.2838i)]
}
