package estimator_test

import (
	"fmt"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// A white sequence passes the Ljung–Box test; the same sequence smoothed
// by a moving average of two does not.
func ExampleLjungBox() {
	rng := rand.New(rand.NewPCG(1, 1))
	white := make([]float64, 500)
	smooth := make([]float64, 500)
	for i := range white {
		white[i] = rng.NormFloat64()
		if i > 0 {
			smooth[i] = white[i] + white[i-1]
		}
	}
	for _, s := range []struct {
		name string
		x    []float64
	}{{"white", white}, {"smoothed", smooth}} {
		rho := estimator.Autocorrelation(make([]float64, 10), s.x)
		_, p := estimator.LjungBox(rho, len(s.x))
		fmt.Printf("%s: white at the 1 %% level: %v\n", s.name, p >= 0.01)
	}
	// Output:
	// white: white at the 1 % level: true
	// smoothed: white at the 1 % level: false
}

// The watch flags a sensor whose normalised innovations shift by two
// standard deviations within a few ticks.
func ExampleSensorWatch() {
	w := estimator.NewSensorWatch(1, estimator.SensorWatchSettings{})
	rng := rand.New(rand.NewPCG(3, 3))
	for k := 0; k < 100; k++ {
		z := rng.NormFloat64()
		if k >= 50 {
			z += 2
		}
		w.Update(0, 60+0.05*z, 0.05*z, 0.05, false)
		if st := w.State(0); st.Bias != 0 {
			fmt.Printf("bias %+d flagged at tick %d, %d ticks after it began\n", st.Bias, k, k-50)
			break
		}
	}
	// Output:
	// bias +1 flagged at tick 56, 6 ticks after it began
}

// Autocovariance least squares recovers the noise of a scalar random walk
// from the innovations of a filter whose gain was designed for other noise.
func ExampleIdentifyNoise() {
	a, c := mat.NewDense(1, 1, []float64{1}), mat.NewDense(1, 1, []float64{1})
	l := mat.NewDense(1, 1, []float64{0.5}) // not the Kalman gain of the truth
	const q, r = 0.01, 0.25
	rng := rand.New(rand.NewPCG(9, 9))
	x, xh := 0.0, 0.0
	innov := [][]float64{make([]float64, 50000)}
	for k := range innov[0] {
		e := x + 0.5*rng.NormFloat64() - xh // r = 0.25
		innov[0][k] = e
		xh += 0.5 * e
		x += 0.1 * rng.NormFloat64() // q = 0.01
	}
	res, err := estimator.IdentifyNoise(a, c, l, innov, estimator.ALSSettings{})
	if err != nil {
		panic(err)
	}
	fmt.Printf("rank %d of %d\n", res.Rank, res.Unknowns)
	fmt.Printf("q ≈ %.3f (simulated %v), r ≈ %.2f (simulated %v)\n", res.Q.At(0, 0), q, res.R.At(0, 0), r)
	// Output:
	// rank 2 of 2
	// q ≈ 0.009 (simulated 0.01), r ≈ 0.25 (simulated 0.25)
}
