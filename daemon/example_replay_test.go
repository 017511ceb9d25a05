package daemon_test

import (
	"fmt"
	"log"
	"os"

	"surmise/config"
	"surmise/daemon"
	"surmise/daemon/recording"
	"surmise/estimator"
)

// Replay the committed historian CSV of the simulated demo plant with the
// active gain set of its gains file, and account for every sample.
func ExampleReplay() {
	plant, err := config.LoadPlant("../testdata/plants/hotwater-loop.yaml")
	if err != nil {
		log.Fatal(err)
	}
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		log.Fatal(err)
	}
	active, err := estimator.Prepare(plant.Model, gains.Set(gains.Active).Set, plant.Gate)
	if err != nil {
		log.Fatal(err)
	}
	f, err := os.Open("../testdata/recordings/hotwater-loop-rehearsal.csv")
	if err != nil {
		log.Fatal(err)
	}
	defer f.Close()
	rec, err := recording.ReadCSV(f, "rehearsal.csv", recording.CSVOptions{Known: daemon.CSVColumns(plant)})
	if err != nil {
		log.Fatal(err)
	}
	src := daemon.NewCSVSource(plant, rec)
	tracking := 0
	res, err := daemon.Replay(plant, []*estimator.Prepared{active}, src, daemon.ReplayOptions{
		Tick: func(_, _ int, est *daemon.Estimate) {
			if est.Status == daemon.StatusTracking {
				tracking++
			}
		},
	})
	if err != nil {
		log.Fatal(err)
	}
	fmt.Printf("%d ticks from %s, %d issues, true states: %v\n", res.Ticks, res.Start.UTC().Format("15:04:05"), len(res.Issues), res.Truth != nil)
	for _, c := range res.Signals {
		fmt.Println(c.String())
	}
	fmt.Println("tracking:", tracking > 0)
	// Output:
	// 240 ticks from 08:00:00, 0 issues, true states: true
	// heater_power: 240 offered
	// tank_outlet: 220 offered, 220 used, 0 stale, 0 superseded
	// hx_outlet: 208 offered, 208 used, 0 stale, 0 superseded
	// tracking: true
}
