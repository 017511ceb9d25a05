package daemon

import (
	"math"
	"testing"

	"surmise/config"
	"surmise/estimator"
)

// engDemoPlant loads the invented hot-water loop (testdata/plants) and its
// gains file.
func engDemoPlant(t testing.TB) (*config.Plant, *config.GainsFile) {
	t.Helper()
	pl, err := config.LoadPlant("../testdata/plants/hotwater-loop-discrete.yaml")
	if err != nil {
		t.Fatal(err)
	}
	gf, err := config.LoadGains(pl.GainsPath, pl)
	if err != nil {
		t.Fatal(err)
	}
	return pl, gf
}

func engPrepare(t testing.TB, pl *config.Plant, gf *config.GainsFile, name string) *estimator.Prepared {
	t.Helper()
	ns := gf.Set(name)
	if ns == nil {
		t.Fatalf("gains file has no set %q", name)
	}
	p, err := estimator.Prepare(pl.Model, ns.Set, pl.Gate)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// TestEngineDemoPlantConverges runs the engine on virtual time against a
// seeded simulation of the demo hot-water loop that starts away from the
// operating point, with each gain set of its gains file. After warm-up the
// estimate of every state not measured directly (element, wall, heat loss)
// must lie within 3σ of the truth, σ the engine's own standard deviation,
// on at least 95 % of the ticks: a consistent estimator has a Gaussian
// error, inside ±3σ 99.7 % of the time (standard normal table).
func TestEngineDemoPlantConverges(t *testing.T) {
	const warm, ticks = 3000, 8000
	pl, gf := engDemoPlant(t)
	md := pl.Model
	// The truth starts off the operating point by about one initial std
	// (initial.std in the plant file is 5, 1, 3, 0.3).
	x0 := []float64{md.X0[0] + 4, md.X0[1] - 0.8, md.X0[2] + 2.5, md.X0[3] + 0.25}
	unmeasured := []int{0, 2, 3} // element_temp, wall_temp, heat_loss
	cases := []struct {
		set  string
		gate float64
	}{
		// The time-varying filter starts from the plant's initial covariance
		// and runs with the plant's gate.
		{"kalman-tv", pl.Gate},
		// The fixed gains claim their steady-state accuracy from the first
		// tick (element_temp: σ = 0.04 K), so with the gate on a start 4 K
		// off would be rejected as outliers for ever: they run ungated.
		{"kalman-current", 0},
		{"kalman-prediction", 0},
	}
	for _, c := range cases {
		t.Run(c.set, func(t *testing.T) {
			ns := gf.Set(c.set)
			if ns == nil {
				t.Fatalf("gains file has no set %q", c.set)
			}
			prep, err := estimator.Prepare(md, ns.Set, c.gate)
			if err != nil {
				t.Fatal(err)
			}
			e := NewEngine(pl, prep, EngineOptions{})
			n, _, p := md.Dims()
			sim := estimator.NewPlant(md, 11, x0)
			est := e.NewEstimate()
			y, x, u := make([]float64, p), make([]float64, n), make([]float64, 1)
			inside := make([]int, n)
			tracking := 0
			for k := 0; k < ticks; k++ {
				tk := engAt(float64(k) * md.Ts)
				// heater power steps between 4 and 8 kW every 5 minutes
				u[0] = 6 + 2*math.Copysign(1, math.Sin(2*math.Pi*float64(k)/600))
				sim.Step(u)
				sim.OutputTo(y)
				e.Offer(0, u[0], tk, tk)
				for j := range y {
					e.Offer(1+j, y[j], tk, tk)
				}
				e.Tick(tk, est)
				// the prediction form publishes x̂(k|k−1): compare with x(k)
				sim.StateTo(x)
				if k < warm {
					continue
				}
				if est.Status == StatusTracking {
					tracking++
				}
				for _, i := range unmeasured {
					s := est.States[i]
					if math.IsNaN(s.Std) || s.Std <= 0 {
						t.Fatalf("tick %d: state %s has no standard deviation", k, s.Name)
					}
					if math.Abs(s.Value-x[i]) <= 3*s.Std {
						inside[i]++
					}
				}
			}
			for _, i := range unmeasured {
				frac := float64(inside[i]) / float64(ticks-warm)
				t.Logf("%s: within 3σ on %.1f %% of the ticks after warm-up", md.States[i].Name, 100*frac)
				if frac < 0.95 {
					t.Errorf("%s within 3σ on %.3f of the ticks, want ≥ 0.95", md.States[i].Name, frac)
				}
			}
			t.Logf("tracking on %d of %d ticks", tracking, ticks-warm)
		})
	}
}

// engDemoRun feeds the engine and a hand-driven filter the same seeded
// simulation of the demo plant; before tick k it calls between(k, f) so a
// test can change the engine and the filter in step.
type engDemoRun struct {
	pl  *config.Plant
	sim *estimator.Plant
	e   *Engine
	est *Estimate
	u   []float64
	y   []float64
}

func newEngDemoRun(t testing.TB, e *Engine, pl *config.Plant, seed uint64) *engDemoRun {
	n, _, p := pl.Model.Dims()
	_ = n
	return &engDemoRun{pl: pl, sim: estimator.NewPlant(pl.Model, seed, nil), e: e, est: e.NewEstimate(),
		u: make([]float64, 1), y: make([]float64, p)}
}

// tick simulates sample k, offers it and ticks; it returns the estimate.
func (r *engDemoRun) tick(k int) *Estimate {
	tk := engAt(float64(k) * r.pl.Model.Ts)
	r.u[0] = 6 + 2*math.Copysign(1, math.Sin(2*math.Pi*float64(k)/600))
	r.sim.Step(r.u)
	r.sim.OutputTo(r.y)
	r.e.Offer(0, r.u[0], tk, tk)
	for j, v := range r.y {
		r.e.Offer(1+j, v, tk, tk)
	}
	r.e.Tick(tk, r.est)
	return r.est
}

// TestEngineLanes checks the gain swaps between ticks against filters
// stepped by hand on the same samples: UseGains switches the active lane
// with the state carried over (estimator.Filter.Use), a candidate lane runs
// its own filter from the plant's initial state on the same snapshot, Reset
// restarts every lane (estimator.Filter.Reset). Agreement is to the last
// bit: the engine must hand each filter exactly the inputs and outputs the
// hand-driven one gets.
func TestEngineLanes(t *testing.T) {
	pl, gf := engDemoPlant(t)
	cur := engPrepare(t, pl, gf, "kalman-current")
	pred := engPrepare(t, pl, gf, "kalman-prediction")
	tv := engPrepare(t, pl, gf, "kalman-tv")
	e := NewEngine(pl, cur, EngineOptions{})
	run := newEngDemoRun(t, e, pl, 5)
	handA := estimator.NewFilter(cur, pl.Initial, pl.InitialCov)
	var handC *estimator.Filter
	n, _, _ := pl.Model.Dims()
	x := make([]float64, n)
	cand := e.NewEstimate()
	full := estimator.FullPattern(2)
	for k := 0; k < 400; k++ {
		switch k {
		case 100:
			e.UseGains(pred)
			handA.Use(pred)
		case 150:
			e.SetCandidate(tv)
			handC = estimator.NewFilter(tv, pl.Initial, pl.InitialCov)
		case 250:
			e.Reset()
			handA.Reset(pl.Initial, pl.InitialCov)
			handC.Reset(pl.Initial, pl.InitialCov)
		case 300:
			e.SetCandidate(nil)
			handC = nil
		}
		est := run.tick(k)
		handA.Step(run.u, run.y, full)
		handA.StateTo(x)
		for i := range x {
			if est.States[i].Value != x[i] {
				t.Fatalf("tick %d: active state %d = %v, hand-driven filter %v", k, i, est.States[i].Value, x[i])
			}
		}
		wantGains := "kalman-current"
		if k >= 100 {
			wantGains = "kalman-prediction"
		}
		if est.Gains != wantGains || est.Fingerprint != gf.Fingerprint {
			t.Fatalf("tick %d: gains %q fingerprint %q, want %q %q", k, est.Gains, est.Fingerprint, wantGains, gf.Fingerprint)
		}
		has := e.CandidateTo(cand)
		if has != (handC != nil) {
			t.Fatalf("tick %d: CandidateTo = %v, want %v", k, has, handC != nil)
		}
		if handC == nil {
			continue
		}
		handC.Step(run.u, run.y, full)
		handC.StateTo(x)
		for i := range x {
			if cand.States[i].Value != x[i] {
				t.Fatalf("tick %d: candidate state %d = %v, hand-driven filter %v", k, i, cand.States[i].Value, x[i])
			}
		}
		if cand.Gains != "kalman-tv" || cand.Seq != est.Seq || !cand.Time.Equal(est.Time) {
			t.Fatalf("tick %d: candidate gains %q seq %d time %v, want kalman-tv %d %v",
				k, cand.Gains, cand.Seq, cand.Time, est.Seq, est.Time)
		}
	}
}

// TestEngineConcurrent offers samples and swaps gains from other goroutines
// while ticking (run it with -race). A swap must never tear a tick: every
// estimate carries one gain set's name with that set's form.
func TestEngineConcurrent(t *testing.T) {
	pl, gf := engDemoPlant(t)
	cur := engPrepare(t, pl, gf, "kalman-current")
	pred := engPrepare(t, pl, gf, "kalman-prediction")
	e := NewEngine(pl, cur, EngineOptions{Candidate: pred})
	form := map[string]string{"kalman-current": "current", "kalman-prediction": "prediction"}
	const ticks = 2000
	done := make(chan struct{})
	errs := make(chan string, 1)
	go func() {
		defer close(done)
		for k := 0; k < ticks; k++ {
			tk := engAt(float64(k) + 0.5)
			if r, ok := e.Offer(0, 6, tk, tk); !ok {
				errs <- "input rejected: " + r.String()
				return
			}
			e.Offer(1, 61, tk, tk)
			e.Offer(2, 54.4, tk, tk)
			if k%7 == 0 {
				e.UseGains(pred)
				e.SetCandidate(cur)
			} else if k%7 == 3 {
				e.UseGains(cur)
				e.SetCandidate(nil)
			}
		}
	}()
	est, cand := e.NewEstimate(), e.NewEstimate()
	for k := 0; k < ticks; k++ {
		e.Tick(engAt(float64(k)), est)
		if form[est.Gains] != est.Form {
			t.Fatalf("tick %d: gains %q with form %q", k, est.Gains, est.Form)
		}
		if e.CandidateTo(cand) && form[cand.Gains] != cand.Form {
			t.Fatalf("tick %d: candidate gains %q with form %q", k, cand.Gains, cand.Form)
		}
	}
	<-done
	select {
	case s := <-errs:
		t.Fatal(s)
	default:
	}
}
