package daemon

import (
	"fmt"
	"math"
	"time"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/estimator"
)

// NoiseOptions are the settings of IdentifyNoise.
type NoiseOptions struct {
	// ALS are the settings of the least-squares fit; the structure
	// (diagonal or full) is taken from the plant file, whatever ALS says.
	ALS estimator.ALSSettings
	// Start and End bound the replay as in ReplayOptions.
	Start, End time.Time
}

// NoiseResult is what IdentifyNoise found.
type NoiseResult struct {
	*estimator.ALSResult
	// Replay is the replay of the filter whose innovations were used.
	Replay *ReplayResult
	// Continuous says Q is a continuous intensity (the plant file's
	// process noise is `time: continuous`); otherwise it is per sample.
	Continuous bool
	// Floored lists the outputs whose measurement variance the fit put at
	// zero, which a plant file cannot hold: they were raised to
	// MeasurementFloor times the innovation variance.
	Floored []int
	// Raised lists the diagonal process-noise elements the fit put at zero
	// where that left no steady-state Kalman filter (a mode on the unit
	// circle, such as a random walk, that no noise excites): they were
	// raised to their standard error, the largest value the data support
	// at about one standard deviation.
	Raised []int
	// DesignErr is the error of a steady-state Kalman design from the
	// noise as written (after raising); nil when it succeeds.
	DesignErr error
}

// MeasurementFloor is the smallest measurement variance IdentifyNoise
// writes, as a fraction of the output's innovation variance: a plant file
// needs a positive one.
const MeasurementFloor = 1e-6

// IdentifyNoise replays src with a prediction-form steady-state Kalman
// gain designed from the plant file's own noise (no gains per pattern, so
// a tick missing an output is a break in the data) and no outlier gate
// (the noise it would judge by is what is in question), collects the
// innovations of the ticks that used every output, and identifies the
// process and measurement noise from them by autocovariance least squares
// (estimator.IdentifyNoise), with the structure the plant file declares:
// standard deviations identify a diagonal, a covariance a full matrix; a
// continuous process intensity is identified as such.
func IdentifyNoise(plant *config.Plant, src *ReplaySource, opts NoiseOptions) (*NoiseResult, error) {
	md := plant.Model
	gs, err := estimator.DesignKalman(md, estimator.Prediction, false)
	if err != nil {
		return nil, fmt.Errorf("noise: the filter from the plant file's noise: %w", err)
	}
	gs.Name = "plant-noise"
	prep, err := estimator.Prepare(md, gs, 0) // no gate: the noise it would judge by is in question
	if err != nil {
		return nil, fmt.Errorf("noise: %w", err)
	}
	_, _, p := md.Dims()
	var innov [][]float64
	res, err := Replay(plant, []*estimator.Prepared{prep}, src, ReplayOptions{
		Start: opts.Start, End: opts.End,
		Progress: func(done, total int) {
			if done == 0 {
				innov = make([][]float64, p)
				for j := range innov {
					innov[j] = make([]float64, 0, total)
				}
			}
		},
		Tick: func(_, _ int, est *Estimate) {
			for j := range est.Outputs {
				o := &est.Outputs[j]
				v := o.Innovation
				if !o.Used || o.Outlier {
					v = math.NaN()
				}
				innov[j] = append(innov[j], v)
			}
		},
	})
	if err != nil {
		return nil, err
	}
	set := opts.ALS
	set.ProcessFull, set.MeasurementFull = !plant.ProcessStd, !plant.MeasurementStd
	set.ProcessToDiscrete = nil
	cont := plant.Continuous != nil && plant.Continuous.Qc != nil
	if cont {
		ca, cb := plant.Continuous.A, plant.Continuous.B
		set.ProcessToDiscrete = func(q *mat.SymDense) *mat.SymDense {
			_, _, qd := estimator.Discretise(ca, cb, q, md.Ts)
			return qd
		}
	}
	als, err := estimator.IdentifyNoise(md.A, md.C, gs.Gains[0].L, innov, set)
	if err != nil {
		return nil, fmt.Errorf("noise: %s: %w", src.Name, err)
	}
	out := &NoiseResult{ALSResult: als, Replay: res, Continuous: cont}
	for j := 0; j < p; j++ {
		floor := MeasurementFloor * als.Autocov[0].At(j, j)
		if als.R.At(j, j) < floor {
			als.R.SetSym(j, j, floor)
			out.Floored = append(out.Floored, j)
		}
	}
	// A zero process noise on an undamped mode leaves no stabilising
	// Riccati solution; raise such zeros to their standard error.
	trial := *md
	trial.Q, trial.R = als.Qd, als.R
	if _, err := estimator.DesignKalman(&trial, estimator.Prediction, false); err != nil {
		q := mat.NewSymDense(als.Q.SymmetricDim(), nil)
		q.CopySym(als.Q)
		for _, e := range als.Elements {
			if e.Process && e.I == e.J && e.Value == 0 && e.StdErr > 0 {
				q.SetSym(e.I, e.I, e.StdErr)
				out.Raised = append(out.Raised, e.I)
			}
		}
		if len(out.Raised) > 0 {
			als.Q = q
			als.Qd = q
			if set.ProcessToDiscrete != nil {
				als.Qd = set.ProcessToDiscrete(q)
			}
			trial.Q = als.Qd
			_, err = estimator.DesignKalman(&trial, estimator.Prediction, false)
		}
		out.DesignErr = err
	}
	return out, nil
}
