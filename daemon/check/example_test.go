package check_test

import (
	"fmt"

	"surmise/config"
	"surmise/daemon/check"
)

// Example checks the invented demo plant with its committed gains file and
// reads a few figures of the report, as `surmise check --json` prints them.
func Example() {
	plant, err := config.LoadPlant("../../testdata/plants/hotwater-loop.yaml")
	if err != nil {
		fmt.Println(err)
		return
	}
	rep := check.Build(plant, plant.GainsPath, false)
	fmt.Println("can run:", rep.CanRun)
	for _, e := range rep.Eigenvalues {
		if e.TimeConstantSeconds != nil {
			fmt.Printf("mode |λ| %.5f, time constant %.4g s\n", e.Abs, *e.TimeConstantSeconds)
		} else {
			fmt.Printf("mode |λ| %.5f, %s\n", e.Abs, e.Kind)
		}
	}
	for _, s := range rep.Gains.Sets {
		fmt.Printf("%s form, %s: spectral radius %.4g\n", s.Form, s.Role, s.Patterns[0].SpectralRadius)
	}
	// Output:
	// can run: true
	// mode |λ| 1.00000, integrator
	// mode |λ| 0.99926, time constant 1353 s
	// mode |λ| 0.87502, time constant 7.49 s
	// mode |λ| 0.86896, time constant 7.12 s
	// prediction form, active: spectral radius 0.997
	// current form, candidate: spectral radius 0.9986
}
