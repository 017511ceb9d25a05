package simplant

import (
	"fmt"
	"time"

	"surmise/config"
)

// TimeScaled returns the plant and its gains file for an estimator that
// keeps pace with a simulation run speed times faster than real time: the
// sample time and every max_age divided by speed, the discrete model
// otherwise the same — so the gain sets, designed for that discrete model,
// still apply — and the gains file's fingerprint recomputed for the changed
// sample time. speed 1 returns plant and gains unchanged. It panics if
// speed is not positive.
//
// This is for demonstrations and tests on a sped-up clock; a real plant
// runs at its own pace.
func TimeScaled(plant *config.Plant, gains *config.GainsFile, speed float64) (*config.Plant, *config.GainsFile) {
	if !(speed > 0) {
		panic(fmt.Sprintf("simplant: TimeScaled: speed %v", speed))
	}
	if speed == 1 {
		return plant, gains
	}
	cp := *plant
	md := *plant.Model
	md.Ts = plant.Model.Ts / speed
	cp.Model = &md
	scale := func(ws []config.Wire) []config.Wire {
		out := append([]config.Wire(nil), ws...)
		for i := range out {
			out[i].MaxAge = time.Duration(float64(out[i].MaxAge) / speed)
		}
		return out
	}
	cp.Inputs, cp.Outputs = scale(plant.Inputs), scale(plant.Outputs)
	var g *config.GainsFile
	if gains != nil {
		gc := *gains
		gc.Fingerprint = config.Fingerprint(&md)
		g = &gc
	}
	return &cp, g
}
