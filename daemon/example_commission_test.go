package daemon_test

import (
	"fmt"
	"time"

	"surmise/config"
	"surmise/daemon"
	"surmise/estimator"
)

// A candidate gain set runs in shadow beside the active one, is promoted
// with the active state kept (no jump), and rolled back. The engine applies
// every change at its next tick.
func ExampleCommissioner() {
	plant, err := config.LoadPlant("testdata/commission/cart.yaml")
	if err != nil {
		panic(err)
	}
	placed, err := estimator.DesignPlaced(plant.Model, estimator.Current, []complex128{0.9, 0.85}, false)
	if err != nil {
		panic(err)
	}
	placed.Name = "placed"
	kalman := &estimator.GainSet{Name: "kalman", Form: estimator.Kalman, Q: plant.Model.Q, R: plant.Model.R}
	gains := config.NewGainsFile(plant)
	gains.Active, gains.Candidate = "placed", "kalman"
	gains.Sets = []config.NamedSet{
		{Set: placed, Provenance: config.Provenance{Method: "poles"}},
		{Set: kalman, Provenance: config.Provenance{Method: "kalman"}},
	}

	active, err := estimator.Prepare(plant.Model, placed, plant.Gate)
	if err != nil {
		panic(err)
	}
	eng := daemon.NewEngine(plant, active, daemon.EngineOptions{})
	c, err := daemon.NewCommissioner(daemon.CommissionerOptions{Plant: plant, Gains: gains, Engine: eng, MinDwell: -1})
	if err != nil {
		panic(err)
	}
	position, _ := eng.SignalIndex("bench.cart.position")
	est, shadow := eng.NewEstimate(), eng.NewEstimate()
	t0 := time.Date(2026, 5, 4, 10, 0, 0, 0, time.UTC)
	tick := func(k int) {
		at := t0.Add(time.Duration(k) * 100 * time.Millisecond)
		eng.Offer(position, 1.2, at, at)
		eng.Tick(at, est)
	}
	tick(0)
	eng.CandidateTo(shadow)
	fmt.Println("active:", est.Gains, "shadow:", shadow.Gains)

	rep, err := c.Promote(daemon.PromoteRequest{Transfer: daemon.KeepState}, daemon.Origin{Who: "example"})
	if err != nil {
		panic(err)
	}
	fmt.Println(rep.Note)
	tick(1)
	fmt.Println("active:", est.Gains, "shadow:", eng.CandidateTo(shadow))

	back, err := c.Rollback(daemon.Origin{Who: "example"})
	if err != nil {
		panic(err)
	}
	fmt.Println(back.Note)
	tick(2)
	fmt.Println("active:", est.Gains)
	// Output:
	// active: placed shadow: kalman
	// kalman promoted, state carried over; shadow stopped; rollback returns placed
	// active: kalman shadow: false
	// placed is active again, state carried over; rollback again returns kalman
	// active: placed
}
