package daemon

import (
	"math"
	"math/rand/v2"
	"os"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/estimator"
)

// honestFigures is what one gain set showed over a set of drawn starts.
type honestFigures struct {
	ticks, coasting, outliers int
	inside                    []int // per state, ticks with |x̂ − x| ≤ 2σ
}

// honestDraw returns the plant's initial state plus a draw from its initial
// covariance (through its Cholesky factor), from a generator of its own.
func honestDraw(t testing.TB, pl *config.Plant, seed uint64) []float64 {
	t.Helper()
	n, _, _ := pl.Model.Dims()
	var ch mat.Cholesky
	if !ch.Factorize(pl.InitialCov) {
		t.Fatal("the plant's initial covariance is not positive definite")
	}
	var l mat.TriDense
	ch.LTo(&l)
	r := rand.New(rand.NewPCG(seed, 0x5eed))
	z := make([]float64, n)
	for i := range z {
		z[i] = r.NormFloat64()
	}
	x := append([]float64(nil), pl.Initial...)
	if x == nil {
		x = append([]float64(nil), pl.Model.X0...)
	}
	for i := 0; i < n; i++ {
		for j := 0; j <= i; j++ {
			x[i] += l.At(i, j) * z[j]
		}
	}
	return x
}

// honestRun runs the engine with the named gain set of the demo plant (the
// continuous hot-water loop, as surmise demo runs it) on fault-free
// simulations whose true start is drawn from the plant's initial
// covariance, one per seed, at the nominal heater power, and counts the
// ticks that coasted, the outliers, and per state the ticks on which the
// truth lay within two published standard deviations of the estimate.
func honestRun(t testing.TB, set string, seeds []uint64, ticks int) honestFigures {
	t.Helper()
	pl, gf := lateDemo(t, 0)
	md := pl.Model
	n, _, p := md.Dims()
	fig := honestFigures{inside: make([]int, n)}
	for _, seed := range seeds {
		e := NewEngine(pl, engPrepare(t, pl, gf, set), EngineOptions{})
		sim := estimator.NewPlant(md, seed, honestDraw(t, pl, seed))
		est := e.NewEstimate()
		y, x, u := make([]float64, p), make([]float64, n), []float64{md.U0[0]}
		for k := 0; k < ticks; k++ {
			tk := engAt(float64(k) * md.Ts)
			sim.Step(u)
			sim.OutputTo(y)
			sim.StateTo(x)
			e.Offer(0, u[0], tk, tk)
			for j := range y {
				e.Offer(1+j, y[j], tk, tk)
			}
			e.Tick(tk, est)
			fig.ticks++
			if est.Status == StatusCoasting {
				fig.coasting++
			}
			fig.outliers += est.Outliers.Len()
			for i, s := range est.States {
				if math.Abs(s.Value-x[i]) <= 2*s.Std {
					fig.inside[i]++
				}
			}
		}
	}
	return fig
}

// checkHonest judges the figures against the goal: coasting on at most 2 %
// of the ticks, outliers at about the gate's own rate, and the truth within
// 2σ on at least 90 % of the ticks for every state (a consistent filter's
// error is Gaussian with the published σ, inside ±2σ 95.4 % of the time:
// the standard normal table, common practice).
func checkHonest(t *testing.T, set string, fig honestFigures, gate float64, outputs int) {
	t.Helper()
	coast := float64(fig.coasting) / float64(fig.ticks)
	// The gate refuses a consistent innovation with probability 1 − gate
	// per tick; allow three times that and a few more for small counts.
	expect := (1 - gate) * float64(fig.ticks)
	t.Logf("%s: %d ticks, coasting %.2f %%, %d outliers (the gate's rate: %.1f)", set, fig.ticks, 100*coast, fig.outliers, expect)
	if coast > 0.02 {
		t.Errorf("%s: coasting on %.2f %% of the ticks, want ≤ 2 %%", set, 100*coast)
	}
	if float64(fig.outliers) > 3*expect+5 {
		t.Errorf("%s: %d outliers, want about the gate's %.1f", set, fig.outliers, expect)
	}
	_ = outputs
	for i, c := range fig.inside {
		frac := float64(c) / float64(fig.ticks)
		t.Logf("%s: state %d within 2σ on %.1f %% of the ticks", set, i, 100*frac)
		if frac < 0.90 {
			t.Errorf("%s: state %d within 2σ on %.1f %% of the ticks, want ≥ 90 %%", set, i, 100*frac)
		}
	}
}

func honestSeeds(lo, hi uint64) []uint64 {
	var s []uint64
	for i := lo; i <= hi; i++ {
		s = append(s, i)
	}
	return s
}

// TestDrawnStartsAcquire pins the goal on a few seeds in every run: both
// gain sets of the demo acquire from starts drawn from the plant's initial
// covariance, without coasting, with outliers at the gate's rate, and with
// a σ that covers the error.
func TestDrawnStartsAcquire(t *testing.T) {
	for _, set := range []string{"poles-prediction", "kalman-current"} {
		checkHonest(t, set, honestRun(t, set, honestSeeds(1, 4), 3600), 0.999, 2)
	}
}

// TestMeasureDrawnStarts is the measurement of the goal over seeds 1 to 20,
// an hour of the demo plant each (the acquisition hands over to the fixed gain after about 11 minutes for the placed set and 22 for the Kalman set), for both gain sets of the demo.
func TestMeasureDrawnStarts(t *testing.T) {
	if os.Getenv("SURMISE_MEASURE") == "" {
		t.Skip("a measurement: set SURMISE_MEASURE=1 to run it")
	}
	for _, set := range []string{"poles-prediction", "kalman-current"} {
		checkHonest(t, set, honestRun(t, set, honestSeeds(1, 20), 3600), 0.999, 2)
	}
}

// TestGateCannotLockOut steps both measured temperatures of a converged
// demo run by 3 K at once, far outside the gate (σ of an innovation is
// about 0.05 K): the gate refuses every sample, the lane is suspect after
// estimator.GateSuspect ticks instead of coasting quietly, and after
// estimator.GateRelease refusals the filter inflates its covariance and
// corrects again, and keeps correcting.
func TestGateCannotLockOut(t *testing.T) {
	pl, gf := lateDemo(t, 0)
	for _, set := range []string{"poles-prediction", "kalman-current"} {
		t.Run(set, func(t *testing.T) {
			md := pl.Model
			_, _, p := md.Dims()
			e := NewEngine(pl, engPrepare(t, pl, gf, set), EngineOptions{})
			sim := estimator.NewPlant(md, 3, nil)
			est := e.NewEstimate()
			y, u := make([]float64, p), []float64{md.U0[0]}
			const step = 300
			refused, suspectAt, correctedAgain := 0, -1, -1
			for k := 0; k < step+100; k++ {
				tk := engAt(float64(k) * md.Ts)
				sim.Step(u)
				sim.OutputTo(y)
				e.Offer(0, u[0], tk, tk)
				for j := range y {
					if k >= step {
						y[j] += 3
					}
					e.Offer(1+j, y[j], tk, tk)
				}
				e.Tick(tk, est)
				switch {
				case k < step:
					if est.Used == 0 {
						t.Fatalf("tick %d before the step: %v, nothing corrected", k, est.Status)
					}
				case est.Used == 0 && correctedAgain < 0:
					refused++
					if est.Status == StatusSuspect && suspectAt < 0 {
						suspectAt = k - step
					}
				case est.Used != 0 && correctedAgain < 0:
					correctedAgain = k - step
				case k > step+60 && est.Used == 0:
					t.Errorf("tick %d: refused again after the re-acquisition", k)
				}
			}
			t.Logf("%s: suspect %d ticks after the step, corrected again after %d", set, suspectAt, correctedAgain)
			if suspectAt < 0 || suspectAt >= estimator.GateSuspect {
				t.Errorf("suspect %d ticks after the step, want within %d", suspectAt, estimator.GateSuspect)
			}
			if correctedAgain < 0 || correctedAgain > estimator.GateRelease {
				t.Errorf("corrected again %d ticks after the step, want by the gate release after %d", correctedAgain, estimator.GateRelease)
			}
		})
	}
}

// divergeRun ticks the engine on a seeded simulation of the demo plant;
// offset(k, j) is added to output j's sample of tick k.
type divergeRun struct {
	pl  *config.Plant
	e   *Engine
	sim *estimator.Plant
	est *Estimate
	u   []float64
	y   []float64
}

func newDivergeRun(t *testing.T, pl *config.Plant, set string) *divergeRun {
	gf, err := config.LoadGains(pl.GainsPath, pl)
	if err != nil {
		t.Fatal(err)
	}
	e := NewEngine(pl, engPrepare(t, pl, gf, set), EngineOptions{})
	_, _, p := pl.Model.Dims()
	return &divergeRun{pl: pl, e: e, sim: estimator.NewPlant(pl.Model, 5, nil), est: e.NewEstimate(),
		u: []float64{pl.Model.U0[0]}, y: make([]float64, p)}
}

func (r *divergeRun) tick(k int, offset float64) *Estimate {
	tk := engAt(float64(k) * r.pl.Model.Ts)
	r.sim.Step(r.u)
	r.sim.OutputTo(r.y)
	r.e.Offer(0, r.u[0], tk, tk)
	for j, v := range r.y {
		r.e.Offer(1+j, v+offset, tk, tk)
	}
	r.e.Tick(tk, r.est)
	return r.est
}

// checkDiverged checks the diverged estimate: it says so and why, carries
// no numbers, and its JSON has nulls where the numbers were.
func checkDiverged(t *testing.T, est *Estimate, why string) {
	t.Helper()
	if est.Status != StatusDiverged || !strings.Contains(est.Diverged, why) {
		t.Fatalf("status %v (%q), want diverged saying %q", est.Status, est.Diverged, why)
	}
	for _, s := range est.States {
		if !math.IsNaN(s.Value) || !math.IsNaN(s.Std) {
			t.Errorf("diverged estimate carries %s = %v ± %v", s.Name, s.Value, s.Std)
		}
	}
	js := string(est.AppendJSON(nil))
	if !strings.Contains(js, `"status":"diverged","diverged":`) || !strings.Contains(js, `"element_temp":{"value":null,"std":null`) {
		t.Errorf("diverged JSON %s", js)
	}
}

// TestDivergence drives the demo engine to divergence: by resets the
// control service would refuse (a state outside its range in the plant
// file; a state that is not a number, as an overflow leaves it), and by a
// sensor that sticks at an absurd value on an output without a range (the
// gate refuses it until it releases, then element_temp leaves its range).
// Each is diverged, without numbers, for DivergedHold ticks, then
// re-initialised from the plant's initial condition and tracking again.
func TestDivergence(t *testing.T) {
	pl, _ := lateDemo(t, 0)
	for _, c := range []struct {
		name, why string
		element   float64
	}{
		{"reset outside the range", "state element_temp = 10000 is outside its range [0, 400]", 1e4},
		{"reset to NaN", "not a finite number", math.NaN()},
	} {
		t.Run(c.name, func(t *testing.T) {
			r := newDivergeRun(t, pl, "poles-prediction")
			for k := 0; k < 50; k++ {
				r.tick(k, 0)
			}
			x := append([]float64(nil), pl.Initial...)
			x[0] = c.element
			r.e.enqueue(laneOp{kind: opReset, x: x})
			k := 50
			for ; k < 50+DivergedHold; k++ {
				checkDiverged(t, r.tick(k, 0), c.why)
			}
			if est := r.tick(k, 0); est.Status == StatusDiverged || !est.Reinitialised || math.IsNaN(est.States[0].Value) {
				t.Fatalf("tick %d, %d after diverging: status %v, reinitialised %v, element %v", k, k-50, est.Status, est.Reinitialised, est.States[0].Value)
			}
			if est := r.tick(k+1, 0); est.Reinitialised || est.Status != StatusTracking {
				t.Errorf("after the re-initialisation: %v, reinitialised %v", est.Status, est.Reinitialised)
			}
		})
	}
	t.Run("sensor", func(t *testing.T) {
		pl := *pl
		pl.Outputs = append([]config.Wire(nil), pl.Outputs...)
		for j := range pl.Outputs {
			pl.Outputs[j].HasRange = false
		}
		r := newDivergeRun(t, &pl, "kalman-current")
		for k := 0; k < 50; k++ {
			r.tick(k, 0)
		}
		k, at := 50, -1
		for ; k < 100 && at < 0; k++ {
			if r.tick(k, 1e6).Status == StatusDiverged {
				at = k
			}
		}
		if at < 0 {
			t.Fatalf("not diverged 50 ticks after a sensor stuck at 1e6: %v", r.est.Status)
		}
		t.Logf("diverged %d ticks after the sensor failed: %s", at-50, r.est.Diverged)
		checkDiverged(t, r.est, "state element_temp")
		for ; k < at+DivergedHold; k++ {
			checkDiverged(t, r.tick(k, 0), "state element_temp")
		}
		if est := r.tick(k, 0); est.Status == StatusDiverged || !est.Reinitialised {
			t.Fatalf("%d ticks after diverging: %v", k-at, est.Status)
		}
	})
}
