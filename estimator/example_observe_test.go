package estimator_test

import (
	"fmt"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// Two identical tanks drain at the same rate and only the sum of their
// levels is measured: the difference between them can never be told apart,
// but it decays, so an observer is still possible.
func ExampleCheckObservability() {
	a := mat.NewDense(2, 2, []float64{0.8, 0, 0, 0.8})
	c := mat.NewDense(1, 2, []float64{1, 1})

	obs := estimator.CheckObservability(a, c)
	fmt.Printf("rank %d of %d, observable %v, detectable %v\n", obs.Rank, obs.N, obs.Observable, obs.Detectable)
	for _, m := range obs.Modes {
		fmt.Printf("λ = %.2f observable %v stable %v states %.3f\n", real(m.Eigenvalue), m.Observable, m.Stable, m.Direction)
	}
	// Output:
	// rank 1 of 2, observable false, detectable true
	// λ = 0.80 observable false stable true states [0.707 0.707]
}

// A state that is the previous sample of another (x1(k+1) = x2(k)) makes A
// singular: the prediction form sees both states, the current form, which
// corrects with C·A, loses the one at λ = 0.
func ExampleCurrentFormOutput() {
	a := mat.NewDense(2, 2, []float64{0, 1, 0, 0.5})
	c := mat.NewDense(1, 2, []float64{1, 0})

	pred := estimator.CheckObservability(a, c)
	cur := estimator.CheckObservability(a, estimator.CurrentFormOutput(a, c))
	fmt.Println("prediction form observable:", pred.Observable)
	fmt.Println("current form observable:", cur.Observable, "detectable:", cur.Detectable)
	// Output:
	// prediction form observable: true
	// current form observable: false detectable: true
}
