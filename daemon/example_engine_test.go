package daemon_test

import (
	"fmt"
	"log"
	"time"

	"surmise/config"
	"surmise/daemon"
	"surmise/estimator"
)

// An engine for the demo hot-water loop, driven on virtual time: samples
// go in with Offer as they arrive, one estimate comes out per Tick.
func ExampleEngine() {
	plant, err := config.LoadPlant("../testdata/plants/hotwater-loop-discrete.yaml")
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
	e := daemon.NewEngine(plant, active, daemon.EngineOptions{})
	est := e.NewEstimate()

	power, _ := e.SignalIndex("pilot.hwl.jc100.out")
	tank, _ := e.SignalIndex("pilot.hwl.tt110.pv")
	hx, _ := e.SignalIndex("pilot.hwl.tt120.pv")
	t0 := time.Date(2025, 3, 1, 12, 0, 0, 0, time.UTC)
	for k := range 3 {
		t := t0.Add(time.Duration(k) * time.Second)
		e.Offer(power, 6.5, time.Time{}, t.Add(-300*time.Millisecond)) // a bare number: its receive time
		e.Offer(tank, 61.02, t.Add(-100*time.Millisecond), t)          // JSON with its own time
		if k != 1 {                                                    // the exchanger sensor misses tick 1
			e.Offer(hx, 54.38, t.Add(-100*time.Millisecond), t)
		}
		e.Tick(t, est)
		fmt.Printf("tick %d %s, corrected with %d output(s), element %.2f %s\n",
			est.Seq, est.Status, est.Used.Len(), est.States[0].Value, est.States[0].Unit)
		if k == 1 {
			// The exchanger's sample of tick 2 arrives 50 ms after that
			// tick ran: the next tick fuses it at its own time, re-running
			// tick 2 with it (its max_delay is the default three periods).
			if _, ok := e.Offer(hx, 54.38, t.Add(-100*time.Millisecond), t.Add(50*time.Millisecond)); ok {
				fmt.Println("a sample of a tick that has run is accepted")
			}
		}
	}
	if _, ok := e.Offer(hx, 54.4, t0.Add(-time.Hour), t0.Add(2100*time.Millisecond)); ok {
		fmt.Println("an hour late, beyond max_delay: accepted now, refused as late by the next tick")
	}
	fmt.Printf("%.110s…\n", est.AppendJSON(nil))
	// Output:
	// tick 1 tracking, corrected with 2 output(s), element 91.20 degC
	// tick 2 tracking, corrected with 1 output(s), element 91.46 degC
	// a sample of a tick that has run is accepted
	// tick 3 tracking, corrected with 2 output(s), element 91.67 degC
	// an hour late, beyond max_delay: accepted now, refused as late by the next tick
	// {"estimator":"hotwater-loop-discrete","instance":"","time":"2025-03-01T12:00:02Z","seq":3,"status":"tracking",…
}
