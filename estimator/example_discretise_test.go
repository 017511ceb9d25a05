package estimator_test

import (
	"fmt"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// A cart on a frictionless track, pushed by a force and buffeted by white
// acceleration noise, sampled every 0.1 s.
func ExampleDiscretise() {
	a := mat.NewDense(2, 2, []float64{0, 1, 0, 0}) // position, velocity
	b := mat.NewDense(2, 1, []float64{0, 1})       // acceleration input
	qc := mat.NewSymDense(2, []float64{0, 0, 0, 2})

	ad, bd, qd := estimator.Discretise(a, b, qc, 0.1)
	fmt.Printf("Ad = %.4g\n", mat.Formatted(ad, mat.Prefix("     ")))
	fmt.Printf("Bd = %.4g\n", mat.Formatted(bd, mat.Prefix("     ")))
	fmt.Printf("Qd = %.4g\n", mat.Formatted(qd, mat.Prefix("     ")))
	// Output:
	// Ad = ⎡  1  0.1⎤
	//      ⎣  0    1⎦
	// Bd = ⎡0.005⎤
	//      ⎣  0.1⎦
	// Qd = ⎡0.0006667       0.01⎤
	//      ⎣     0.01        0.2⎦
}
