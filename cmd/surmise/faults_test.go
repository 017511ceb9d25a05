package main

import (
	"testing"
	"time"

	"surmise/config"
	"surmise/daemon"
	"surmise/daemon/report"
	"surmise/estimator"
)

// replaySummaries replays a committed recording of the demo plant with its
// gains file's sets, as the replay verb does, and summarises each run.
func replaySummaries(t *testing.T, data string) []report.Summary {
	t.Helper()
	plant, err := config.LoadPlant(plantPath("hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	runs, err := replayGainSets(plant, nil)
	if err != nil {
		t.Fatal(err)
	}
	src, err := readRecording(plant, &replayFlags{data: recordingPath(data), delimiter: ","})
	if err != nil {
		t.Fatal(err)
	}
	n, _, p := plant.Model.Dims()
	in := &report.Input{Plant: plant.Name, Source: data}
	for i := 0; i < n; i++ {
		in.StateNames = append(in.StateNames, stateName(plant, i))
	}
	for _, w := range plant.Outputs {
		in.OutputNames = append(in.OutputNames, w.Signal)
	}
	sets := make([]*estimator.Prepared, len(runs))
	rows := make([]report.TickRow, len(runs))
	for i, r := range runs {
		sets[i] = r.prep
		in.Runs = append(in.Runs, report.Run{Gains: r.name, Form: r.prep.Form().String(), Ticks: report.NewTicks(n, p, 300)})
		rows[i] = report.TickRow{States: make([]float64, n), StateStd: make([]float64, n),
			Innovations: make([]float64, p), InnovationStd: make([]float64, p), Faults: make([]uint8, p)}
	}
	res, err := daemon.Replay(plant, sets, src, daemon.ReplayOptions{Tick: func(set, _ int, est *daemon.Estimate) {
		fillRow(&rows[set], est)
		in.Runs[set].Ticks.Append(&rows[set])
	}})
	if err != nil {
		t.Fatal(err)
	}
	in.Truth = res.Truth
	return report.Summarise(in)
}

// TestRehearsalFaults replays the rehearsal recordings, whose scenario
// (testdata/recordings/README.md, `surmise simulate --print-scenario`)
// puts a +1 K bias on hx_outlet from 45 s to 65 s of each two-minute cycle,
// besides a tank_outlet drop-out (20–30 s), three 2 K spikes on tank_outlet
// (70–78 s), a slow hx_outlet (85–105 s) and jittered arrival (105–120 s).
// Every gain set must flag the bias, reading high, within 10 s of its start;
// the consistent Kalman set must flag nothing else — no bias outside the
// scripted bias and the 10 s it takes the CUSUM to clear, nothing stuck,
// nothing on tank_outlet. The pole-placement set flags the sensor's bias
// too, and its own lag after the slow-sensor stretch (its innovations stay
// about 2σ off for several ticks): that is not checked here.
func TestRehearsalFaults(t *testing.T) {
	for _, data := range []string{"hotwater-loop-rehearsal.csv", "hotwater-loop-rehearsal.jsonl"} {
		for _, s := range replaySummaries(t, data) {
			hx := s.Outputs[1]
			for _, start := range []time.Duration{45 * time.Second, 165 * time.Second} {
				found := false
				for _, e := range hx.Faults {
					at := e.Start.Sub(s.Start)
					if e.Kind == report.FaultBiasHigh && at >= start && at <= start+10*time.Second {
						found = true
					}
				}
				if !found {
					t.Errorf("%s, %s: no bias (reads high) on hx_outlet within 10 s of %v: %+v", data, s.Gains, start, hx.Faults)
				}
			}
			for _, o := range s.Outputs {
				for _, e := range o.Faults {
					if e.Kind == report.FaultStuck {
						t.Errorf("%s, %s: %s stuck at %v", data, s.Gains, o.Name, e.Start.Sub(s.Start))
					}
				}
			}
			if s.Gains != "kalman-current" {
				continue
			}
			if f := s.Outputs[0].Faults; len(f) > 0 {
				t.Errorf("%s, %s: tank_outlet flagged: %+v", data, s.Gains, f)
			}
			for _, e := range hx.Faults {
				from, to := e.Start.Sub(s.Start)%(2*time.Minute), e.End.Sub(s.Start)%(2*time.Minute)
				if from < 45*time.Second || to > 75*time.Second {
					t.Errorf("%s, %s: hx_outlet %s from %v to %v of its cycle, outside the scripted bias", data, s.Gains, report.FaultName(e.Kind), from, to)
				}
			}
		}
	}
}
