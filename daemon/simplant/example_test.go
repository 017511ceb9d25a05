package simplant_test

import (
	"fmt"
	"log"

	"surmise/config"
	"surmise/daemon/simplant"
)

// A scenario written for the demo plant, run for a few samples without a
// bus: the heater steps to 7.5 kW at 2 s, the tank sensor drops out from 1 s
// to 3 s.
func Example() {
	plant, err := config.LoadPlant("../../testdata/plants/hotwater-loop.yaml")
	if err != nil {
		log.Fatal(err)
	}
	sc, err := simplant.ParseScenario("inline.yaml", []byte(`
length: 4s
events:
  - {at: 2s, step: heater_power, value: 7.5}
  - {at: 1s, dropout: tank_outlet, for: 2s}
`), plant)
	if err != nil {
		log.Fatal(err)
	}
	sim, err := simplant.New(plant, sc, simplant.Options{Seed: 1})
	if err != nil {
		log.Fatal(err)
	}
	var msgs []simplant.Message
	for range 4 {
		msgs = sim.Step(msgs[:0])
		for _, m := range msgs {
			if m.Role == simplant.Truth {
				continue
			}
			line := fmt.Sprintf("%v %-6s %s", m.At, m.Role, m.Subject)
			if m.Role == simplant.Input {
				line += fmt.Sprintf(" = %g", m.Value)
			}
			fmt.Println(line)
		}
	}
	fmt.Println(plant.TruthSubject("heat_loss"))
	// Output:
	// 0s input  pilot.hwl.jc100.out = 6
	// 0s output pilot.hwl.tt110.pv
	// 0s output pilot.hwl.tt120.pv
	// 1s input  pilot.hwl.jc100.out = 6
	// 1s output pilot.hwl.tt120.pv
	// 2s input  pilot.hwl.jc100.out = 7.5
	// 2s output pilot.hwl.tt120.pv
	// 3s input  pilot.hwl.jc100.out = 7.5
	// 3s output pilot.hwl.tt110.pv
	// 3s output pilot.hwl.tt120.pv
	// surmise.hotwater-loop.truth.heat_loss
}

// The built-in rehearsal scenario for the demo plant, as a file to edit.
func ExampleFormat() {
	plant, err := config.LoadPlant("../../testdata/plants/hotwater-loop.yaml")
	if err != nil {
		log.Fatal(err)
	}
	sc, err := simplant.Builtin("rehearsal", plant)
	if err != nil {
		log.Fatal(err)
	}
	fmt.Print(string(simplant.Format(sc)))
	// Output:
	// # A scenario for surmise simulate: timed events in plant time (see `go doc surmise/daemon/simplant`).
	// name: "rehearsal"
	// length: 2m0s
	// repeat: true
	// events:
	//   - {at: 0s, prbs: "heater_power", low: 4.2, high: 7.8, hold: 4s, for: 40s}
	//   - {at: 40s, step: "heater_power", value: 7.8}
	//   - {at: 1m20s, step: "heater_power", value: 4.2}
	//   - {at: 20s, dropout: "tank_outlet", for: 10s}
	//   - {at: 45s, bias: "hx_outlet", value: 1, for: 20s}
	//   - {at: 1m10s, spikes: "tank_outlet", value: 2, count: 3, every: 4s}
	//   - {at: 1m25s, slow: "hx_outlet", ticks: 5, for: 20s}
	//   - {at: 1m45s, jitter: "all", max: 400ms, for: 15s}
}
