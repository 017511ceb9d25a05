package daemon_test

import (
	"bytes"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

	"surmise/config"
	"surmise/daemon"
	"surmise/daemon/recording"
	"surmise/daemon/simplant"
	"surmise/estimator"
)

// rpDemo loads the demo plant and prepares the sets of its gains file,
// active first.
func rpDemo(t testing.TB) (*config.Plant, *config.GainsFile, []*estimator.Prepared) {
	t.Helper()
	plant := recDemoPlant(t)
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		t.Fatal(err)
	}
	var sets []*estimator.Prepared
	for _, name := range []string{gains.Active, gains.Candidate} {
		p, err := estimator.Prepare(plant.Model, gains.Set(name).Set, plant.Gate)
		if err != nil {
			t.Fatal(err)
		}
		sets = append(sets, p)
	}
	return plant, gains, sets
}

// rpSimCSV returns n samples of the simulated demo plant as a historian CSV
// starting at start (UTC), with the scenario named.
func rpSimCSV(t testing.TB, plant *config.Plant, scenario string, seed uint64, start time.Time, n int) string {
	t.Helper()
	sc, err := simplant.Builtin(scenario, plant)
	if err != nil {
		t.Fatal(err)
	}
	sim, err := simplant.New(plant, sc, simplant.Options{Seed: seed})
	if err != nil {
		t.Fatal(err)
	}
	var b bytes.Buffer
	if _, err := simplant.WriteCSV(&b, sim, simplant.Clock{Start: start, Speed: 1}, time.Duration(n)*time.Second); err != nil {
		t.Fatal(err)
	}
	return b.String()
}

// rpTick is what the tests compare of one tick.
type rpTick struct {
	time     time.Time
	status   string
	states   []float64
	measured []float64
	nis      float64
	dof      int
	used     estimator.Pattern
}

// rpReplay replays a CSV and returns the ticks of each gain set.
func rpReplay(t testing.TB, plant *config.Plant, sets []*estimator.Prepared, csv string, opts recording.CSVOptions) ([][]rpTick, *daemon.ReplayResult) {
	t.Helper()
	opts.Known = daemon.CSVColumns(plant)
	rec, err := recording.ReadCSV(strings.NewReader(csv), "test.csv", opts)
	if err != nil {
		t.Fatal(err)
	}
	out := make([][]rpTick, len(sets))
	res, err := daemon.Replay(plant, sets, daemon.NewCSVSource(plant, rec), daemon.ReplayOptions{
		Tick: func(set, k int, est *daemon.Estimate) {
			tk := rpTick{time: est.Time, status: est.Status.String(), nis: est.NIS, dof: est.Dof, used: est.Used}
			for _, s := range est.States {
				tk.states = append(tk.states, s.Value)
			}
			for _, o := range est.Outputs {
				tk.measured = append(tk.measured, o.Measured)
			}
			out[set] = append(out[set], tk)
		},
	})
	if err != nil {
		t.Fatal(err)
	}
	return out, res
}

func rpSame(a, b float64) bool { return a == b || math.IsNaN(a) && math.IsNaN(b) }

// rpCompare reports the first tick where two replays differ.
func rpCompare(got, want []rpTick) error {
	if len(got) != len(want) {
		return fmt.Errorf("%d ticks, want %d", len(got), len(want))
	}
	for k := range got {
		g, w := got[k], want[k]
		if !g.time.Equal(w.time) || g.status != w.status || g.dof != w.dof || g.used != w.used || !rpSame(g.nis, w.nis) {
			return fmt.Errorf("tick %d: %v %s dof %d used %b NIS %v, want %v %s dof %d used %b NIS %v",
				k, g.time, g.status, g.dof, g.used, g.nis, w.time, w.status, w.dof, w.used, w.nis)
		}
		for i := range g.states {
			if !rpSame(g.states[i], w.states[i]) {
				return fmt.Errorf("tick %d: state %d = %v, want %v", k, i, g.states[i], w.states[i])
			}
		}
		for j := range g.measured {
			if !rpSame(g.measured[j], w.measured[j]) {
				return fmt.Errorf("tick %d: output %d measured %v, want %v", k, j, g.measured[j], w.measured[j])
			}
		}
	}
	return nil
}

// TestReplayMatchesFilter replays a simulated CSV with every sample present
// and checks each gain set's estimates against estimator.Filter stepped
// directly with the same inputs and measurements (u(k) decided at sample k,
// held for the prediction to k+1, as estimator.Plant documents): the replay
// adds timing, and with samples on the ticks it must not change a number.
func TestReplayMatchesFilter(t *testing.T) {
	plant, _, sets := rpDemo(t)
	start := time.Date(2026, 1, 5, 8, 0, 0, 0, time.UTC)
	csv := rpSimCSV(t, plant, "steady", 21, start, 150)
	got, res := rpReplay(t, plant, sets, csv, recording.CSVOptions{})
	if res.Ticks != 150 || !res.Start.Equal(start) {
		t.Fatalf("%d ticks from %v, want 150 from %v", res.Ticks, res.Start, start)
	}
	rec, err := recording.ReadCSV(strings.NewReader(csv), "test.csv", recording.CSVOptions{Known: daemon.CSVColumns(plant)})
	if err != nil {
		t.Fatal(err)
	}
	// The rows as vectors: u, y.
	u := make([][]float64, 150)
	y := make([][]float64, 150)
	for k := range u {
		u[k], y[k] = make([]float64, 1), make([]float64, 2)
	}
	for _, s := range rec.Samples {
		k := int(s.Time.Sub(start) / time.Second)
		switch s.Signal {
		case "heater_power":
			u[k][0] = s.Value
		case "tank_outlet":
			y[k][0] = s.Value
		case "hx_outlet":
			y[k][1] = s.Value
		}
	}
	for si, prep := range sets {
		var f *estimator.Filter
		if plant.InitialCov != nil {
			f = estimator.NewFilter(prep, plant.Initial, plant.InitialCov)
		} else {
			f = estimator.NewFilter(prep, plant.Initial, nil)
		}
		x := make([]float64, 4)
		for k := range 150 {
			f.Step(u[k], y[k], estimator.FullPattern(2))
			f.StateTo(x)
			for i := range x {
				if got[si][k].states[i] != x[i] {
					t.Fatalf("set %s, tick %d: state %d = %v, the filter's %v", prep.Set().Name, k, i, got[si][k].states[i], x[i])
				}
			}
		}
	}
	// The truth columns became the result's truth, one value per tick.
	if len(res.Truth) != 4 || len(res.Truth[0]) != 150 {
		t.Fatalf("truth %d columns", len(res.Truth))
	}
	if len(res.Issues) != 0 {
		t.Errorf("issues: %v", res.Issues)
	}
}

// rpLines splits a CSV into its header and rows.
func rpLines(csv string) (string, []string) {
	lines := strings.Split(strings.TrimSuffix(csv, "\n"), "\n")
	return lines[0], lines[1:]
}

func rpJoin(header string, rows []string) string {
	return header + "\n" + strings.Join(rows, "\n") + "\n"
}

// rpSetCell returns row with column c (0 = time) set to v.
func rpSetCell(row string, c int, v string) string {
	cells := strings.Split(row, ",")
	cells[c] = v
	return strings.Join(cells, ",")
}

// TestReplayCSV is the table test of historian CSV quirks at the replay
// level: each case edits a simulated CSV and says which CSV, replayed, must
// give the same ticks — or what must be seen — and which issue lines must
// be reported.
func TestReplayCSV(t *testing.T) {
	plant, _, sets := rpDemo(t)
	utc := time.Date(2026, 1, 5, 8, 0, 0, 0, time.UTC)
	base := rpSimCSV(t, plant, "rehearsal", 5, utc, 60)
	header, rows := rpLines(base)
	berlin, err := time.LoadLocation("Europe/Berlin")
	if err != nil {
		t.Fatal(err)
	}
	// local rewrites the time column as zone-less wall-clock time in
	// Berlin, starting at start.
	local := func(start time.Time) (zoneless, reference string) {
		ref := rpSimCSV(t, plant, "rehearsal", 5, start, 60)
		h, rs := rpLines(ref)
		out := make([]string, len(rs))
		for k, r := range rs {
			at := start.Add(time.Duration(k) * time.Second).In(berlin)
			out[k] = rpSetCell(r, 0, at.Format("2006-01-02 15:04:05"))
		}
		return rpJoin(h, out), ref
	}
	const tank, hx = 2, 3 // columns: time, heater_power, tank_outlet, hx_outlet, truth…
	for _, tc := range []struct {
		name   string
		edit   func() (got, want string) // the edited CSV and the CSV it must replay like
		opts   recording.CSVOptions
		issues []int // lines of the issues expected
		check  func(t *testing.T, ticks []rpTick, res *daemon.ReplayResult)
	}{{
		name: "missing cells",
		edit: func() (string, string) {
			rs := append([]string(nil), rows...)
			for k := 5; k < 15; k++ {
				rs[k] = rpSetCell(rs[k], hx, "")
			}
			return rpJoin(header, rs), ""
		},
		check: func(t *testing.T, ticks []rpTick, res *daemon.ReplayResult) {
			for k := 5; k < 15; k++ {
				// Only tank_outlet: one output, the placed gain for it alone.
				if tk := ticks[k]; !math.IsNaN(tk.measured[1]) || tk.dof != 1 || tk.used != 1 || tk.status != "tracking" {
					t.Errorf("tick %d: %+v, want hx_outlet missing, NIS of 1 output, tracking", k, tk)
				}
			}
			// The rehearsal's slow hx_outlet and tank dropout start after 20 s.
			if c := res.Signals[2]; c.Offered != 50 || c.Used != 50 {
				t.Errorf("hx_outlet: %s; want 50 offered and used", c.String())
			}
		},
	}, {
		name: "duplicate times: the last row's value wins",
		edit: func() (string, string) {
			rs := append([]string(nil), rows...)
			dup := rpSetCell(rs[30], tank, "70.5")
			got := append(append(append([]string(nil), rs[:31]...), dup), rs[31:]...)
			want := append([]string(nil), rs...)
			want[30] = dup
			return rpJoin(header, got), rpJoin(header, want)
		},
		issues: []int{32, 33}, // the two rows of 08:00:30 (the header is line 1): a value per column replaced, and the row
	}, {
		name: "out-of-order rows are sorted",
		edit: func() (string, string) {
			rs := append([]string(nil), rows...)
			rs[40], rs[41] = rs[41], rs[40]
			return rpJoin(header, rs), base
		},
		issues: []int{43}, // the row that goes back in time
	}, {
		name: "zone-less Berlin times over the spring change",
		edit: func() (string, string) {
			// 01:59:30 CET, then 03:00:00 CEST 30 s later.
			return local(time.Date(2026, 3, 29, 0, 59, 30, 0, time.UTC))
		},
		opts: recording.CSVOptions{Location: berlin},
	}, {
		name: "zone-less Berlin times over the autumn change",
		edit: func() (string, string) {
			// 02:59:30 CEST, then 02:00:00 CET again 30 s later.
			return local(time.Date(2026, 10, 25, 0, 59, 30, 0, time.UTC))
		},
		opts: recording.CSVOptions{Location: berlin},
		// Every row lies in the hour that is repeated (02:00 to 03:00
		// local): one issue for the run, at its first row.
		issues: []int{2},
	}} {
		t.Run(tc.name, func(t *testing.T) {
			got, want := tc.edit()
			ticks, res := rpReplay(t, plant, sets, got, tc.opts)
			var lines []int // the lines with issues, each once
			for _, is := range res.Issues {
				if len(lines) == 0 || lines[len(lines)-1] != is.Line {
					lines = append(lines, is.Line)
				}
			}
			if fmt.Sprint(lines) != fmt.Sprint(tc.issues) && !(len(lines) == 0 && len(tc.issues) == 0) {
				t.Errorf("issues at lines %v, want %v: %v", lines, tc.issues, res.Issues)
			}
			if want != "" {
				wantTicks, _ := rpReplay(t, plant, sets, want, recording.CSVOptions{})
				for s := range sets {
					if err := rpCompare(ticks[s], wantTicks[s]); err != nil {
						t.Errorf("set %s: %v", sets[s].Set().Name, err)
					}
				}
			}
			if tc.check != nil {
				tc.check(t, ticks[0], res)
			}
		})
	}
}

// TestReplayBusIssues replays a bus recording with every kind of trouble
// and checks that each is reported at its line, and that the accounting of
// every output adds up.
func TestReplayBusIssues(t *testing.T) {
	plant, _, sets := rpDemo(t)
	t0 := time.Date(2026, 1, 5, 8, 0, 0, 0, time.UTC)
	var b bytes.Buffer
	w := recording.NewWriter(&b)
	at := func(s float64) time.Time { return t0.Add(time.Duration(s * float64(time.Second))) }
	write := func(recv float64, subject, payload string) {
		if err := w.Write(at(recv), subject, []byte(payload)); err != nil {
			t.Fatal(err)
		}
	}
	const tank, hx, heater = "pilot.hwl.tt110.pv", "pilot.hwl.tt120.pv", "pilot.hwl.jc100.out"
	// Line 1: taken by the first tick, at 0 s, but 5 s old (max_age 3 s).
	write(0, tank, `{"value": 61, "time": "2026-01-05T07:59:55Z"}`)
	for k := range 10 { // lines 2 to 31, one sample of each a second
		s := float64(k) + 0.1
		write(s, heater, "6")
		write(s, tank, "61")
		write(s, hx, "54.4")
	}
	write(10.2, tank, "61.1")                                        // line 32: for the tick at 11 s…
	write(10.25, tank, "61.2")                                       // 33: …which takes this newer one instead
	write(10.3, tank, "120")                                         // 34: out of range
	write(10.4, hx, "warm")                                          // 35: does not decode
	write(10.5, hx, `{"value": 54, "time": "2026-01-05T08:00:09Z"}`) // 36: dated before the tick at 10 s: late
	write(10.6, "pilot.hwl.fan.pv", "3")                             // 37: not wired
	write(10.7, "pilot.hwl.fan.pv", "3")                             // 38: not wired
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	br, err := recording.ReadJSONL(&b, "bus.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	res, err := daemon.Replay(plant, sets, daemon.NewBusSource(plant, br), daemon.ReplayOptions{Start: t0})
	if err != nil {
		t.Fatal(err)
	}
	if res.Ticks != 12 {
		t.Errorf("%d ticks, want 12 (0 s to 11 s, the first at or after the last sample)", res.Ticks)
	}
	var got []string
	for _, is := range res.Issues {
		got = append(got, is.String())
	}
	want := []string{
		`line 34: signal "tank_outlet": 1 sample refused by the engine (range): outside the signal's range in the plant file`,
		`line 35: subject "pilot.hwl.tt120.pv": sample refused (parse): "warm" is not a decimal number`,
		`line 36: signal "hx_outlet": 1 sample refused by the engine (late): dated at or before a tick that had already run when it was received`,
		`line 37: subject "pilot.hwl.fan.pv": not wired in plant hotwater-loop: 2 messages skipped`,
	}
	if strings.Join(got, "\n") != strings.Join(want, "\n") {
		t.Errorf("issues:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	for _, c := range res.Signals[1:] {
		if c.Offered != c.RefusedTotal()+c.Used+c.Stale+c.Superseded {
			t.Errorf("%s: does not add up", c.String())
		}
	}
	// tank_outlet: 14 offered; 1 refused (range); the first stale at tick
	// 0; the ten regular ones used at ticks 1 to 10, and at tick 11 61.2,
	// which superseded 61.1.
	if got, want := res.Signals[1].String(), "tank_outlet: 14 offered, 1 refused (range 1), 11 used, 1 stale, 1 superseded"; got != want {
		t.Errorf("got  %s\nwant %s", got, want)
	}
	if got, want := res.Signals[2].String(), "hx_outlet: 11 offered, 1 refused (late 1), 10 used, 0 stale, 0 superseded"; got != want {
		t.Errorf("got  %s\nwant %s", got, want)
	}
}

// TestReplayFirstTick checks where the ticks of a replay fall when no start
// is given: on a recording's own estimates, else half a period after the
// samples' arrival, and on a CSV's first row.
func TestReplayFirstTick(t *testing.T) {
	plant, _, sets := rpDemo(t)
	t0 := time.Date(2026, 1, 5, 8, 0, 0, 0, time.UTC)
	at := func(s float64) time.Time { return t0.Add(time.Duration(s * float64(time.Second))) }
	// A burst per second — the heater, then the two temperatures a few
	// microseconds later, as a plant publishes them — dated at the whole
	// second and received 0.2 ms to 0.3 ms after it.
	burst := func(w *recording.Writer, k int) {
		for i, subj := range []string{"pilot.hwl.jc100.out", "pilot.hwl.tt110.pv", "pilot.hwl.tt120.pv"} {
			v := []float64{6, 61, 54.4}[i]
			recv := at(float64(k) + 0.0002 + float64(i)*0.00005)
			if err := w.Write(recv, subj, simplant.AppendPayload(nil, v, at(float64(k)))); err != nil {
				t.Fatal(err)
			}
		}
	}
	replay := func(withEstimates bool) (*daemon.ReplayResult, time.Time, string) {
		var b bytes.Buffer
		w := recording.NewWriter(&b)
		for k := range 20 {
			burst(w, k)
			if withEstimates {
				// The recorded daemon ticked at 0.7 s past each second.
				est := fmt.Sprintf(`{"time":"%s","seq":%d}`, at(float64(k)+0.7).Format(time.RFC3339Nano), k+1)
				w.Write(at(float64(k)+0.7001), "surmise.hotwater-loop.estimate", []byte(est))
			}
		}
		br, err := recording.ReadJSONL(&b, "bus.jsonl")
		if err != nil {
			t.Fatal(err)
		}
		src := daemon.NewBusSource(plant, br)
		first, why := src.FirstTick(plant)
		res, err := daemon.Replay(plant, sets, src, daemon.ReplayOptions{})
		if err != nil {
			t.Fatal(err)
		}
		return res, first, why
	}

	res, first, why := replay(false)
	// Arrivals 0.2 ms, 0.25 ms and 0.3 ms after each second (circular
	// mean 0.25 ms): ticks half a period later, 0.50025 s after each
	// second.
	if want := at(0.0002 + 0.5 + 0.00005); first.Sub(want).Abs() > time.Microsecond {
		t.Errorf("first tick %v (%s), want %v", first, why, want)
	}
	for _, c := range res.Signals {
		if c.RefusedTotal() != 0 || (c.Output && c.Used != 20) {
			t.Errorf("%s: want every sample used", c.String())
		}
	}
	if len(res.Issues) != 0 {
		t.Errorf("issues: %v", res.Issues)
	}

	res, first, why = replay(true)
	if !first.Equal(at(0.7)) || !strings.Contains(why, "20 estimates") {
		t.Errorf("first tick %v (%s), want the first estimate's time %v", first, why, at(0.7))
	}
	if len(res.Issues) != 0 {
		t.Errorf("issues (the estimates are not samples of an unwired subject): %v", res.Issues)
	}
	if !res.Start.Equal(at(0.7)) || res.Ticks != 20 {
		t.Errorf("%d ticks from %v, want 20 from %v", res.Ticks, res.Start, at(0.7))
	}

	csv := rpSimCSV(t, plant, "steady", 3, t0, 10)
	rec, err := recording.ReadCSV(strings.NewReader(csv), "t.csv", recording.CSVOptions{Known: daemon.CSVColumns(plant)})
	if err != nil {
		t.Fatal(err)
	}
	if first, _ := daemon.NewCSVSource(plant, rec).FirstTick(plant); !first.Equal(t0) {
		t.Errorf("CSV: first tick %v, want the first row's %v", first, t0)
	}
}
