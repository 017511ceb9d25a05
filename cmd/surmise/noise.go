package main

import (
	"context"
	"fmt"
	"io"
	"math"
	"os"
	"strings"
	"time"

	"surmise/config"
	"surmise/daemon"
	"surmise/estimator"
)

const noiseSynopsis = `[flags] PLANT.yaml --data FILE [-o OUT.yaml]

Estimates the process and measurement noise of the plant from a recording:
a steady-state Kalman filter designed from the plant file's own noise runs
over the recording (the replay engine, no outlier gate), and the noise is
fitted to the autocovariances of its innovations by autocovariance least
squares (Odelson, Rajamani and Rawlings, Automatica 42(2), 2006), kept
positive semidefinite. The plant file's form is kept: standard deviations
identify a diagonal, a covariance a full matrix; a continuous process noise
is identified as an intensity.

Prints each element with its standard error (from disjoint segments of the
recording), whether the data identify it, and the rank and condition of the
least-squares system. With -o, writes a copy of the plant file with the new
noise and its provenance, ready for 'surmise design'. The recording needs
long stretches with every output present; ticks missing an output break it.`

func runNoise(_ context.Context, e *env, args []string) error {
	fs := newFlags(e, "noise", noiseSynopsis)
	var f replayFlags
	var out string
	var lags, segments int
	fs.StringVar(&f.data, "data", "", "the recording `FILE`: a historian CSV or a bus recording")
	fs.StringVar(&out, "o", "", "write the plant file with the identified noise to `FILE`")
	fs.IntVar(&lags, "lags", estimator.DefaultALSLags, "fit `N` autocovariance lags, 0 to N−1")
	fs.IntVar(&segments, "segments", estimator.DefaultALSSegments, "split the recording into `N` disjoint segments for the standard errors (1: none)")
	csvFlags(fs, &f)
	plantPath, err := parsePlantAndData(fs, args, &f)
	if err != nil {
		return err
	}
	if lags < 1 || segments < 1 {
		return usageError("--lags and --segments must be at least 1")
	}
	data, err := os.ReadFile(plantPath)
	if err != nil {
		return err
	}
	plant, err := config.ParsePlant(plantPath, data)
	if err != nil {
		return err
	}
	src, err := readRecording(plant, &f)
	if err != nil {
		return err
	}
	printIssues(e, src.Name, src.Issues, false)
	res, err := daemon.IdentifyNoise(plant, src, daemon.NoiseOptions{ALS: estimator.ALSSettings{Lags: lags, Segments: segments}})
	if err != nil {
		return err
	}
	writeNoiseReport(e.stdout, plant, src.Name, res)
	if out == "" {
		return nil
	}
	written, err := config.RewriteNoise(plantPath, data, res.Q, res.R, noiseProvenance(plant, src.Name, res))
	if err != nil {
		return err
	}
	if _, err := config.ParsePlant(out, written); err != nil {
		return fmt.Errorf("the plant file with the identified noise does not parse: %w", err)
	}
	if err := writeAtomic(out, written); err != nil {
		return err
	}
	fmt.Fprintf(e.stdout, "wrote %s; next: surmise design %s\n", out, out)
	return nil
}

// noiseRow is one identified element, named for printing.
type noiseRow struct {
	name, unit string
	e          estimator.ALSElement
	was        float64
}

func noiseRows(plant *config.Plant, res *daemon.NoiseResult) (proc, meas []noiseRow) {
	md := plant.Model
	wasQ := md.Q
	if res.Continuous {
		wasQ = plant.Continuous.Qc
	}
	for _, el := range res.Elements {
		r := noiseRow{e: el}
		if el.Process {
			r.name = stateName(plant, el.I)
			if el.I != el.J {
				r.name += "·" + stateName(plant, el.J)
			}
			r.unit = stateUnit(plant, el.I)
			r.was = wasQ.At(el.I, el.J)
			proc = append(proc, r)
			continue
		}
		r.name = plant.Outputs[el.I].Signal
		if el.I != el.J {
			r.name += "·" + plant.Outputs[el.J].Signal
		}
		r.unit = plant.Outputs[el.I].Unit
		r.was = md.R.At(el.I, el.J)
		meas = append(meas, r)
	}
	return proc, meas
}

// writeNoiseReport prints what IdentifyNoise found.
func writeNoiseReport(w io.Writer, plant *config.Plant, source string, res *daemon.NoiseResult) {
	ts := time.Duration(plant.Model.Ts * float64(time.Second))
	fmt.Fprintf(w, "noise of %s from %s: %d ticks every %v replayed with the plant file's Kalman filter; %d used (%d skipped after the start and after each gap), %d lags\n",
		plant.Name, source, res.Replay.Ticks, ts, res.Ticks, res.Skip, len(res.Autocov))
	cond := "∞ (rank deficient)"
	if !math.IsInf(res.Cond, 1) {
		cond = fnum(res.Cond)
	}
	fmt.Fprintf(w, "least squares: %d unknowns, %d equations, rank %d, condition %s", res.Unknowns, res.Equations, res.Rank, cond)
	if res.Rank < res.Unknowns {
		fmt.Fprintf(w, " (%s over the identified part)", fnum(res.CondIdentified))
	}
	if res.Constrained {
		fmt.Fprint(w, "; the positive semidefinite constraint is active")
	}
	fmt.Fprintln(w)
	proc, meas := noiseRows(plant, res)
	kind := "covariance per sample"
	per := ""
	if res.Continuous {
		kind, per = "continuous intensity", "/s"
	}
	for _, part := range []struct {
		title string
		rows  []noiseRow
		per   string
	}{{"process noise (" + kind + ")", proc, per}, {"measurement noise (covariance per sample)", meas, ""}} {
		fmt.Fprintln(w, part.title)
		for _, r := range part.rows {
			se := "no standard error"
			if !math.IsNaN(r.e.StdErr) {
				se = "± " + fnum(r.e.StdErr)
			}
			note := "identified"
			if !(r.e.StdErr < math.Abs(r.e.Value)) && !math.IsNaN(r.e.StdErr) {
				note = "identified, but poorly determined (standard error not below the value)"
			}
			if !r.e.Identified {
				note = "NOT identified by these data (kept where the fit left it)"
			}
			std := ""
			if r.e.I == r.e.J {
				std = fmt.Sprintf(", std %s (was %s)", fnum(math.Sqrt(r.e.Value)), fnum(math.Sqrt(r.was)))
			}
			fmt.Fprintf(w, "  %-24s %s %s %s²%s%s; was %s; %s\n", r.name, fnum(r.e.Value), se, r.unit, part.per, std, fnum(r.was), note)
		}
	}
	for _, j := range res.Floored {
		fmt.Fprintf(w, "note: the fit put the measurement variance of %s at zero; raised to %g of its innovation variance (a plant file needs it positive)\n", plant.Outputs[j].Signal, daemon.MeasurementFloor)
	}
	for _, i := range res.Raised {
		fmt.Fprintf(w, "note: the fit put the process noise of %s at zero, which leaves no steady-state Kalman filter; raised to its standard error\n", stateName(plant, i))
	}
	if res.DesignErr != nil {
		fmt.Fprintf(w, "warning: no steady-state Kalman filter can be designed from the identified noise: %v\n", res.DesignErr)
	}
}

// noiseProvenance is the comment written above the new noise.
func noiseProvenance(plant *config.Plant, source string, res *daemon.NoiseResult) string {
	var b strings.Builder
	fmt.Fprintf(&b, "Noise identified by %s (surmise noise) from %s on %s:\n", version(), source, time.Now().UTC().Format(time.RFC3339))
	fmt.Fprintf(&b, "autocovariance least squares (Odelson, Rajamani and Rawlings, 2006), %d lags, %d ticks,\n", len(res.Autocov), res.Ticks)
	fmt.Fprintf(&b, "rank %d of %d unknowns. Variances ± standard error (from disjoint segments); the values before:\n", res.Rank, res.Unknowns)
	proc, meas := noiseRows(plant, res)
	for _, r := range append(proc, meas...) {
		kind := "measurement"
		if r.e.Process {
			kind = "process"
		}
		se := ""
		if !math.IsNaN(r.e.StdErr) {
			se = " ± " + fnum(r.e.StdErr)
		}
		id := ""
		if !r.e.Identified {
			id = " (not identified)"
		}
		fmt.Fprintf(&b, "  %s %s: %s%s%s, was %s\n", kind, r.name, fnum(r.e.Value), se, id, fnum(r.was))
	}
	return b.String()
}
