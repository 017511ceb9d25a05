package estimator_test

import (
	"fmt"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// A position-measured double integrator sampled at T = 0.1 s, with both
// observer poles at 0.5.
func ExamplePlaceObserver() {
	a := mat.NewDense(2, 2, []float64{1, 0.1, 0, 1})
	c := mat.NewDense(1, 2, []float64{1, 0})
	poles := []complex128{0.5, 0.5}
	for _, form := range []estimator.Form{estimator.Prediction, estimator.Current} {
		l, err := estimator.PlaceObserver(a, c, form, poles)
		if err != nil {
			fmt.Println(err)
			return
		}
		// A double pole is computed to about 1e-8 (defective eigenvalue);
		// print the real parts.
		ev := estimator.Eigenvalues(estimator.ErrorDynamics(a, c, l, form))
		fmt.Printf("%-10s L = [%.4f, %.4f], error poles %.4f, %.4f\n", form, l.At(0, 0), l.At(1, 0), real(ev[0]), real(ev[1]))
	}
	// Output:
	// prediction L = [1.0000, 2.5000], error poles 0.5000, 0.5000
	// current    L = [0.7500, 2.5000], error poles 0.5000, 0.5000
}
