package config_test

import (
	"fmt"
	"strings"

	"surmise/config"
)

const examplePlant = `name: cart
model:
  time: discrete
  sample: 100ms
  A: [[1, 0.1], [0, 1]]
  B: [[0.005], [0.1]]
  C: [[1, 0]]
states:
  - {name: position, unit: m}
  - {name: velocity, unit: m/s}
inputs:
  - {name: accel, unit: m/s2, subject: bench.cart.accel}
outputs:
  - {name: pos, unit: m, subject: bench.cart.x, range: [-1, 1]}
noise:
  process: {std: [0.001, 0.01]}
  measurement: {std: [0.01]}
`

func ExampleParsePlant() {
	plant, err := config.ParsePlant("plants/cart.yaml", []byte(examplePlant))
	if err != nil {
		fmt.Println(err)
		return
	}
	n, m, p := plant.Model.Dims()
	fmt.Printf("%s: %d states, %d input, %d output, Ts %v s\n", plant.Name, n, m, p, plant.Model.Ts)
	fmt.Println("gains file:", plant.GainsPath)
	fmt.Println("estimates on:", plant.Publish+".estimate")
	fmt.Printf("gate %v, window %d ticks\n", plant.Gate, plant.Window)
	for _, w := range plant.Outputs {
		fmt.Printf("output %s on %s, stale after %v, valid [%v, %v]\n", w.Signal, w.Subject, w.MaxAge, w.Min, w.Max)
	}
	// Output:
	// cart: 2 states, 1 input, 1 output, Ts 0.1 s
	// gains file: plants/cart.gains.yaml
	// estimates on: surmise.cart.estimate
	// gate 0.999, window 100 ticks
	// output pos on bench.cart.x, stale after 300ms, valid [-1, 1]
}

// Every problem of a file is reported at once, with its position and field.
func ExampleParsePlant_errors() {
	bad := strings.NewReplacer("sample: 100ms", "sample: 100", "[[1, 0]]", "[[1, 0, 0]]", "bench.cart.x", "bench.*").Replace(examplePlant)
	_, err := config.ParsePlant("cart.yaml", []byte(bad))
	fmt.Println(err)
	// Output:
	// cart.yaml:4:11: model.sample: want a duration with its unit, such as 500ms or 2s, got the number 100
	// cart.yaml:7:6: model.C: 1×3, want 1×2 (outputs by states)
	// cart.yaml:14:35: outputs[0].subject: subject "bench.*" has a wildcard (* or >): each signal needs one concrete subject
}

func ExampleParseGains() {
	plant, err := config.ParsePlant("cart.yaml", []byte(examplePlant))
	if err != nil {
		fmt.Println(err)
		return
	}
	// Poles 0.5, 0.5 with the position measured: L = [1, 2.5] (the closed
	// form for the double integrator with T = 0.1).
	file := `fingerprint: ` + config.Fingerprint(plant.Model) + `
active: poles
sets:
  - name: poles
    form: prediction
    gains:
      - outputs: [pos]
        L: [[1], [2.5]]
        poles: ["0.5", "0.5"]
    provenance: {method: poles, poles: ["0.5", "0.5"]}
`
	gains, err := config.ParseGains("cart.gains.yaml", []byte(file), plant)
	if err != nil {
		fmt.Println(err)
		return
	}
	set := gains.Set(gains.Active)
	fmt.Println(set.Set.Name, set.Set.Form, set.Provenance.Method)
	fmt.Println("L =", set.Set.Gains[0].L.RawMatrix().Data)

	// The same gains for a model sampled at 200 ms are refused.
	slow, _ := config.ParsePlant("cart.yaml", []byte(strings.Replace(examplePlant, "100ms", "200ms", 1)))
	_, err = config.ParseGains("cart.gains.yaml", []byte(file), slow)
	fmt.Println(strings.Contains(err.Error(), "designed for a different model"))
	// Output:
	// poles prediction poles
	// L = [1 2.5]
	// true
}
