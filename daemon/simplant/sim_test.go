package simplant

import (
	"math"
	"testing"
	"time"

	"surmise/config"
	"surmise/estimator"
)

// TestPRBSMaximalLength checks the shift register against the properties
// of a maximal-length sequence of a primitive degree-7 polynomial (x⁷ + x⁶
// + 1, taps 7 and 6 in the tables of Xilinx application note XAPP052,
// "Efficient Shift Registers, LFSR Counters, and Long Pseudo-Random Sequence
// Generators", 1996): from any nonzero state the period is 2⁷ − 1 = 127, and
// a period holds 2⁶ = 64 ones and 63 zeros (Golomb's balance property).
func TestPRBSMaximalLength(t *testing.T) {
	for s := uint8(1); s < 128; s++ {
		var bits [prbsPeriod]bool
		prbsBits(&bits, s)
		ones := 0
		for _, b := range bits {
			if b {
				ones++
			}
		}
		if ones != 64 {
			t.Errorf("state %d: %d ones in a period, want 64", s, ones)
		}
		// No shorter period: the sequence differs from each of its shifts.
		for shift := 1; shift < prbsPeriod; shift++ {
			same := true
			for i := range bits {
				if bits[i] != bits[(i+shift)%prbsPeriod] {
					same = false
					break
				}
			}
			if same {
				t.Fatalf("state %d: period %d, want 127", s, shift)
			}
		}
	}
}

// collect runs sim for n samples and returns its messages.
func collect(sim *Sim, n int) []Message {
	var out []Message
	for range n {
		out = sim.Step(out)
	}
	return out
}

// TestSimIsThePlant checks that, with the inputs the scenario sets, the
// truth and the measurements are exactly those of estimator.NewPlant with
// the same seed and initial state (the noise does not depend on the
// scenario's events), and that the published inputs are what the plant got.
func TestSimIsThePlant(t *testing.T) {
	plant := demoPlant(t)
	sc, err := Builtin("rehearsal", plant)
	if err != nil {
		t.Fatal(err)
	}
	// Without faults: only the input events.
	var inputsOnly Scenario = *sc
	inputsOnly.Events = nil
	for _, ev := range sc.Events {
		if ev.Kind == Step || ev.Kind == PRBS {
			inputsOnly.Events = append(inputsOnly.Events, ev)
		}
	}
	const seed = 42
	x0 := []float64{95, 62, 53, 0.2}
	sim, err := New(plant, &inputsOnly, Options{Seed: seed, X0: x0})
	if err != nil {
		t.Fatal(err)
	}
	ref := estimator.NewPlant(plant.Model, seed, x0)
	y, x := make([]float64, 2), make([]float64, 4)
	var msgs []Message
	for k := range 300 {
		msgs = sim.Step(msgs[:0])
		if len(msgs) != 1+2+4 {
			t.Fatalf("sample %d: %d messages, want 7", k, len(msgs))
		}
		u := msgs[0]
		if u.Role != Input || u.Subject != "pilot.hwl.jc100.out" || u.At != time.Duration(k)*time.Second {
			t.Fatalf("sample %d: first message %+v, want the heater input at %ds", k, u, k)
		}
		ref.Step([]float64{u.Value})
		ref.OutputTo(y)
		ref.StateTo(x)
		for j := range y {
			if m := msgs[1+j]; m.Role != Output || m.Value != y[j] {
				t.Fatalf("sample %d: output %d = %+v, want %v", k, j, m, y[j])
			}
		}
		for i := range x {
			if m := msgs[3+i]; m.Role != Truth || m.Value != x[i] {
				t.Fatalf("sample %d: state %d = %+v, want %v", k, i, m, x[i])
			}
		}
	}
}

// TestSimEvents checks each kind of event against the package
// documentation, sample by sample, with the faults of testdata/example.yaml
// compared to a run without them (same seed: the same noise).
func TestSimEvents(t *testing.T) {
	plant := demoPlant(t)
	sc, err := LoadScenario("testdata/example.yaml", plant)
	if err != nil {
		t.Fatal(err)
	}
	clean := *sc
	clean.Events = sc.Events[:2] // the prbs and the step only
	const n = 200                // more than two cycles of 90 s
	sim, err := New(plant, sc, Options{Seed: 7})
	if err != nil {
		t.Fatal(err)
	}
	ref, err := New(plant, &clean, Options{Seed: 7})
	if err != nil {
		t.Fatal(err)
	}
	type key struct {
		k    int
		role Role
		i    int
	}
	index := func(ms []Message) map[key]Message {
		out := map[key]Message{}
		for _, m := range ms {
			out[key{m.K, m.Role, m.Index}] = m
		}
		return out
	}
	got, want := index(collect(sim, n)), index(collect(ref, n))
	const tank, hx = 0, 1
	for k := range n {
		tau := k % 90 // the scenario repeats every 90 s, one sample a second
		u, uok := got[key{k, Input, 0}]
		wu := want[key{k, Input, 0}]
		// The heater: the prbs for 30 s between 4.5 and 7.5, then 7.
		switch {
		case !uok:
			t.Fatalf("sample %d: no input published", k)
		case u.Value != wu.Value:
			t.Fatalf("sample %d: input %v, the clean run's %v", k, u.Value, wu.Value)
		case tau < 30 && u.Value != 4.5 && u.Value != 7.5:
			t.Fatalf("sample %d: input %v during the prbs, want 4.5 or 7.5", k, u.Value)
		case tau >= 30 && u.Value != 7:
			t.Fatalf("sample %d: input %v after the step, want 7", k, u.Value)
		}
		// Jitter on every signal from 60 s for 10 s, at most 300 ms; on the
		// heater at most 2 s from 75 s for 5 s; none otherwise.
		maxDelay := time.Duration(0)
		if tau >= 60 && tau < 70 {
			maxDelay = 300 * time.Millisecond
		}
		if tau >= 75 && tau < 80 {
			maxDelay = 2 * time.Second
		}
		if u.Delay < 0 || u.Delay > maxDelay || (maxDelay == 0) != (u.Delay == 0) {
			t.Errorf("sample %d: input delay %v, want within [0, %v)", k, u.Delay, maxDelay)
		}
		// tank_outlet: missing from 10 s for 5 s; spikes +3 at 50 s and −3
		// at 52 s.
		tm, tok := got[key{k, Output, tank}]
		wt := want[key{k, Output, tank}]
		if dropped := tau >= 10 && tau < 15; tok == dropped {
			t.Errorf("sample %d: tank_outlet published %v, want %v", k, tok, !dropped)
		}
		if tok {
			spike := map[int]float64{50: 3, 52: -3}[tau]
			if d := tm.Value - wt.Value; math.Abs(d-spike) > 1e-9 {
				t.Errorf("sample %d: tank_outlet off by %v, want %v", k, d, spike)
			}
		}
		// hx_outlet: biased by −0.8 from 40 s to the end of the cycle; on
		// one sample in 4 from 55 s for 20 s.
		hm, hok := got[key{k, Output, hx}]
		wh := want[key{k, Output, hx}]
		if slowSkip := tau >= 55 && tau < 75 && (tau-55)%4 != 0; hok == slowSkip {
			t.Errorf("sample %d: hx_outlet published %v, want %v", k, hok, !slowSkip)
		}
		if hok {
			bias := 0.0
			if tau >= 40 {
				bias = -0.8
			}
			if d := hm.Value - wh.Value; math.Abs(d-bias) > 1e-9 {
				t.Errorf("sample %d: hx_outlet off by %v, want %v", k, d, bias)
			}
			if tau >= 60 && tau < 70 && hm.Delay >= 300*time.Millisecond {
				t.Errorf("sample %d: hx_outlet delay %v, want below 300ms", k, hm.Delay)
			}
		}
		for i := range 4 {
			if got[key{k, Truth, i}].Value != want[key{k, Truth, i}].Value {
				t.Fatalf("sample %d: state %d differs from the clean run", k, i)
			}
		}
	}
}

// TestMeasurementNoise checks the published measurements of a run without
// events against the plant file's measurement noise, 0.05 K per output:
// y − (Y0 + C·x) is the drawn noise, whose sample variance over N draws
// lies within ±5·√(2/N) of σ² with overwhelming probability (the variance of
// a sample variance of normal draws is 2σ⁴/(N−1); SOURCES.md:
// sample-statistics).
func TestMeasurementNoise(t *testing.T) {
	plant := demoPlant(t)
	sc := &Scenario{Name: "still", Length: time.Second, Events: []Event{{Kind: Step, Signal: "heater_power", Value: 6}}}
	sim, err := New(plant, sc, Options{Seed: 3})
	if err != nil {
		t.Fatal(err)
	}
	const n = 20000
	c := plant.Model.C
	var sum, sum2 [2]float64
	var msgs []Message
	for range n {
		msgs = sim.Step(msgs[:0])
		x := []float64{msgs[3].Value, msgs[4].Value, msgs[5].Value, msgs[6].Value}
		for j := range 2 {
			pred := plant.Model.Y0[j]
			for i := range 4 {
				pred += c.At(j, i) * (x[i] - plant.Model.X0[i])
			}
			e := msgs[1+j].Value - pred
			sum[j] += e
			sum2[j] += e * e
		}
	}
	const sigma = 0.05 // measurement.std of testdata/plants/hotwater-loop.yaml
	for j := range 2 {
		mean := sum[j] / n
		v := sum2[j]/n - mean*mean
		if tol := 5 * sigma * sigma * math.Sqrt(2.0/n); math.Abs(v-sigma*sigma) > tol {
			t.Errorf("output %d: noise variance %g, want %g ± %g", j, v, sigma*sigma, tol)
		}
		if tol := 5 * sigma / math.Sqrt(n); math.Abs(mean) > tol {
			t.Errorf("output %d: noise mean %g, want 0 ± %g", j, mean, tol)
		}
	}
}

// TestInitialDraw checks the draw of the true initial state: without a
// covariance it is the initial state itself; with the demo plant's
// (initial.std [5, 1, 3, 0.3]) the draws over many seeds have those
// standard deviations (each within 5·σ/√(2N) of a sample standard
// deviation's spread, a large-sample bound; SOURCES.md: sample-statistics).
func TestInitialDraw(t *testing.T) {
	plant := demoPlant(t)
	bare := *plant
	bare.InitialCov = nil
	if x := initialDraw(&bare, 9); x[0] != 91.2 || x[1] != 61 || x[2] != 52.3 || x[3] != 0 {
		t.Errorf("without a covariance: %v, want the nominal state [91.2 61 52.3 0]", x)
	}
	const n = 4000
	var sum, sum2 [4]float64
	for seed := range uint64(n) {
		x := initialDraw(plant, seed)
		for i, v := range x {
			d := v - []float64{91.2, 61, 52.3, 0}[i]
			sum[i] += d
			sum2[i] += d * d
		}
	}
	for i, sigma := range []float64{5, 1, 3, 0.3} {
		sd := math.Sqrt(sum2[i]/n - (sum[i]/n)*(sum[i]/n))
		if tol := 5 * sigma / math.Sqrt(2*n); math.Abs(sd-sigma) > tol {
			t.Errorf("state %d: spread %g, want %g ± %g", i, sd, sigma, tol)
		}
	}
}

// TestStreamOrder checks that a stream delivers every message once, in
// order of arrival, ties in the order of production.
func TestStreamOrder(t *testing.T) {
	plant := demoPlant(t)
	sc, err := Builtin("rehearsal", plant)
	if err != nil {
		t.Fatal(err)
	}
	newSim := func() *Sim {
		s, err := New(plant, sc, Options{Seed: 11})
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	const n = 360
	all := collect(newSim(), n)
	st := NewStream(newSim())
	seen := map[[3]int]bool{}
	var prev Message
	delayed := 0
	for i := 0; ; i++ {
		m := st.Next()
		if m.K >= n {
			break
		}
		if i > 0 && m.Arrival() < prev.Arrival() {
			t.Fatalf("message %d arrives at %v, before the previous one (%v)", i, m.Arrival(), prev.Arrival())
		}
		if m.Delay > 0 {
			delayed++
		}
		seen[[3]int{m.K, int(m.Role), m.Index}] = true
		prev = m
	}
	// Every message of the samples before the jitter of the last cycle
	// (at 345 s) has been delivered.
	for _, m := range all {
		if m.K < 345 && !seen[[3]int{m.K, int(m.Role), m.Index}] {
			t.Fatalf("message %+v never delivered", m)
		}
	}
	if delayed == 0 {
		t.Error("no jittered message in three cycles of the rehearsal")
	}
}

func TestSimAllocs(t *testing.T) {
	plant := demoPlant(t)
	sc, err := Builtin("rehearsal", plant)
	if err != nil {
		t.Fatal(err)
	}
	sim, err := New(plant, sc, Options{Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	buf := make([]Message, 0, 16)
	if a := testing.AllocsPerRun(500, func() { buf = sim.Step(buf[:0]) }); a != 0 {
		t.Errorf("Step: %v allocations, want 0", a)
	}
	st := NewStream(sim)
	for range 1000 { // let the heap and buffers grow
		st.Next()
	}
	if a := testing.AllocsPerRun(2000, func() { st.Next() }); a != 0 {
		t.Errorf("Stream.Next: %v allocations, want 0", a)
	}
}

// TestTruthSubject checks the subject the demo plant's true states go to.
func TestTruthSubject(t *testing.T) {
	plant := demoPlant(t)
	if got := plant.TruthSubject("heat_loss"); got != "surmise.hotwater-loop.truth.heat_loss" {
		t.Errorf("got %q", got)
	}
}

// TestTimeScaled checks the plant for a sped-up run: sample time and
// max_age divided by the speed, the discrete matrices shared, the gains
// file's fingerprint that of the new model (config.Fingerprint hashes the
// sample time), and speed 1 the identity.
func TestTimeScaled(t *testing.T) {
	plant := demoPlant(t)
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		t.Fatal(err)
	}
	p2, g2 := TimeScaled(plant, gains, 5)
	if p2.Model.Ts != 0.2 || p2.Inputs[0].MaxAge != time.Second || p2.Outputs[1].MaxAge != 600*time.Millisecond {
		t.Errorf("Ts %v, max_age %v and %v; want 0.2, 1s and 600ms (5s and 3s in the file)", p2.Model.Ts, p2.Inputs[0].MaxAge, p2.Outputs[1].MaxAge)
	}
	if p2.Model.A != plant.Model.A || plant.Model.Ts != 1 || plant.Inputs[0].MaxAge != 5*time.Second {
		t.Error("the discrete model was copied or the original changed")
	}
	if g2.Fingerprint != config.Fingerprint(p2.Model) || g2.Fingerprint == gains.Fingerprint || gains.Fingerprint != config.Fingerprint(plant.Model) {
		t.Error("fingerprints: want the new model's on the copy, the old file unchanged")
	}
	if p1, g1 := TimeScaled(plant, gains, 1); p1 != plant || g1 != gains {
		t.Error("speed 1 changed something")
	}
}
