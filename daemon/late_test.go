package daemon

import (
	"math"
	"syscall"
	"testing"
	"time"

	"surmise/config"
	"surmise/estimator"
)

// lateFeed is one seeded simulation of the demo plant, sample by sample, so
// that two engines can be fed the same samples with different arrival times.
type lateFeed struct {
	u    [][]float64
	y    [][]float64
	x    [][]float64
	plnt *config.Plant
}

func newLateFeed(t testing.TB, pl *config.Plant, seed uint64, ticks int) *lateFeed {
	t.Helper()
	md := pl.Model
	n, _, p := md.Dims()
	sim := estimator.NewPlant(md, seed, nil)
	f := &lateFeed{plnt: pl}
	for k := 0; k < ticks; k++ {
		u := []float64{6 + 2*math.Copysign(1, math.Sin(2*math.Pi*float64(k)/600))}
		sim.Step(u)
		y, x := make([]float64, p), make([]float64, n)
		sim.OutputTo(y)
		sim.StateTo(x)
		f.u, f.y, f.x = append(f.u, u), append(f.y, y), append(f.x, x)
	}
	return f
}

func lateDemo(t testing.TB, maxDelay time.Duration) (*config.Plant, *config.GainsFile) {
	t.Helper()
	pl, err := config.LoadPlant("../testdata/plants/hotwater-loop.yaml")
	if err != nil {
		t.Fatal(err)
	}
	gf, err := config.LoadGains(pl.GainsPath, pl)
	if err != nil {
		t.Fatal(err)
	}
	if maxDelay > 0 {
		cp := *pl
		cp.Outputs = append([]config.Wire(nil), pl.Outputs...)
		cp.Inputs = append([]config.Wire(nil), pl.Inputs...)
		for i := range cp.Outputs {
			cp.Outputs[i].MaxDelay = maxDelay
			cp.Outputs[i].MaxAge = maxDelay + 3*time.Second
		}
		for i := range cp.Inputs {
			cp.Inputs[i].MaxDelay = maxDelay
		}
		pl = &cp
	}
	return pl, gf
}

// TestLateSampleFusedAtItsTime feeds two engines the same simulated demo
// samples, one on time, the other with both temperatures of tick 50 arriving
// late — 1 ms after tick 50 ran, and, for a second case, 40 ticks after it
// with max_delay 1m. From the tick that receives the late samples on, the
// late engine's estimate is the on-time engine's to the last bit: the
// sample was fused at its own tick, not at its arrival.
func TestLateSampleFusedAtItsTime(t *testing.T) {
	for _, c := range []struct {
		name     string
		maxDelay time.Duration
		after    int // ticks after its own the late sample arrives
	}{
		{"a millisecond late, default max_delay", 0, 0},
		{"forty ticks late, max_delay 1m", time.Minute, 40},
	} {
		t.Run(c.name, func(t *testing.T) {
			pl, gf := lateDemo(t, c.maxDelay)
			const ticks, late = 200, 50
			feed := newLateFeed(t, pl, 4, ticks)
			for _, set := range []string{"place-prediction", "kalman-current"} {
				on := NewEngine(pl, engPrepare(t, pl, gf, set), EngineOptions{Candidate: engPrepare(t, pl, gf, "kalman-current")})
				off := NewEngine(pl, engPrepare(t, pl, gf, set), EngineOptions{Candidate: engPrepare(t, pl, gf, "kalman-current")})
				a, b := on.NewEstimate(), off.NewEstimate()
				ca, cb := on.NewEstimate(), off.NewEstimate()
				for k := 0; k < ticks; k++ {
					tk := engAt(float64(k))
					for _, e := range []*Engine{on, off} {
						e.Offer(0, feed.u[k][0], tk, tk)
					}
					for j, v := range feed.y[k] {
						on.Offer(1+j, v, tk, tk)
						if k != late {
							off.Offer(1+j, v, tk, tk)
						}
					}
					on.Tick(tk, a)
					off.Tick(tk, b)
					if k == late+c.after {
						for j, v := range feed.y[late] {
							if r, ok := off.Offer(1+j, v, engAt(late), tk.Add(time.Millisecond)); !ok {
								t.Fatalf("late sample refused: %v", r)
							}
						}
					}
					if k <= late+c.after {
						continue
					}
					on.CandidateTo(ca)
					off.CandidateTo(cb)
					for i := range a.States {
						if a.States[i].Value != b.States[i].Value || a.States[i].Std != b.States[i].Std ||
							ca.States[i].Value != cb.States[i].Value {
							t.Fatalf("%s tick %d: state %d is %v ± %v on time, %v ± %v with the late sample", set, k, i,
								a.States[i].Value, a.States[i].Std, b.States[i].Value, b.States[i].Std)
						}
					}
					if a.Status != b.Status || math.Abs(a.NISMean-b.NISMean) > 1e-12 {
						t.Fatalf("%s tick %d: status %v, NIS mean %v on time; %v, %v with the late sample", set, k, a.Status, a.NISMean, b.Status, b.NISMean)
					}
				}
			}
		})
	}
}

// TestLateBeyondHorizon offers a sample of a tick beyond the signal's
// max_delay: it is refused as late and changes nothing.
func TestLateBeyondHorizon(t *testing.T) {
	pl, gf := lateDemo(t, 0) // max_delay: 3 s, the default
	feed := newLateFeed(t, pl, 4, 20)
	on := NewEngine(pl, engPrepare(t, pl, gf, "kalman-current"), EngineOptions{})
	off := NewEngine(pl, engPrepare(t, pl, gf, "kalman-current"), EngineOptions{})
	a, b := on.NewEstimate(), off.NewEstimate()
	for k := 0; k < 20; k++ {
		tk := engAt(float64(k))
		for _, e := range []*Engine{on, off} {
			e.Offer(0, feed.u[k][0], tk, tk)
			for j, v := range feed.y[k] {
				e.Offer(1+j, v, tk, tk)
			}
		}
		if k == 10 {
			off.Offer(1, 99, engAt(5.5), tk.Add(time.Millisecond)) // tick 6, 4 s before tick 10's successor
		}
		on.Tick(tk, a)
		off.Tick(tk, b)
		for i := range a.States {
			if a.States[i].Value != b.States[i].Value {
				t.Fatalf("tick %d: a sample beyond max_delay changed state %d", k, i)
			}
		}
	}
}

// TestTickPhases runs the demo plant's engine with its sensors stamping
// their samples at the top of each second and the messages taking a
// millisecond, against ticks at many phases across the period — including
// ticks that fall between a sample's stamp and its arrival, so that every
// sample arrives just after its tick has run. With the default max_delay no
// tick coasts from the phase alone: each late sample is fused at its own
// tick by the next one.
func TestTickPhases(t *testing.T) {
	pl, gf := lateDemo(t, 0)
	feed := newLateFeed(t, pl, 6, 300)
	for _, phase := range []time.Duration{0, 200 * time.Microsecond, 500 * time.Microsecond, 999 * time.Microsecond,
		time.Millisecond, 2 * time.Millisecond, 100 * time.Millisecond, 500 * time.Millisecond, 999 * time.Millisecond} {
		e := NewEngine(pl, engPrepare(t, pl, gf, "place-prediction"), EngineOptions{})
		est := e.NewEstimate()
		coasting := 0
		next := 0 // the next sample to deliver
		for k := 0; k < 300; k++ {
			tk := engAt(float64(k)).Add(phase)
			// deliver every sample received by the tick: stamped at second
			// s, received at s + 1 ms
			for ; next < len(feed.y) && !engAt(float64(next)).Add(time.Millisecond).After(tk); next++ {
				at, recv := engAt(float64(next)), engAt(float64(next)).Add(time.Millisecond)
				e.Offer(0, feed.u[next][0], at, recv)
				for j, v := range feed.y[next] {
					if r, ok := e.Offer(1+j, v, at, recv); !ok {
						t.Fatalf("phase %v: sample %d of output %d refused: %v", phase, next, j, r)
					}
				}
			}
			e.Tick(tk, est)
			if k > 2 && est.Status == StatusCoasting {
				coasting++
			}
		}
		if coasting > 0 {
			t.Errorf("phase %v: %d ticks coasting from the phase alone", phase, coasting)
		}
	}
}

// TestLateTickAllocs asserts that neither the steady tick nor a tick that
// places a late sample and re-runs allocates.
func TestLateTickAllocs(t *testing.T) {
	pl, gf := lateDemo(t, time.Minute)
	feed := newLateFeed(t, pl, 4, 400)
	e := NewEngine(pl, engPrepare(t, pl, gf, "place-prediction"), EngineOptions{Candidate: engPrepare(t, pl, gf, "kalman-current")})
	est := e.NewEstimate()
	k := 0
	step := func(late bool) {
		tk := engAt(float64(k))
		e.Offer(0, feed.u[k][0], tk, tk)
		e.Offer(1, feed.y[k][0], tk, tk)
		if late {
			e.Offer(2, feed.y[k-30][1], engAt(float64(k-30)), tk)
		} else {
			e.Offer(2, feed.y[k][1], tk, tk)
		}
		e.Tick(tk, est)
		k++
	}
	for k < 100 {
		step(false)
	}
	if a := testing.AllocsPerRun(50, func() { step(false) }); a != 0 {
		t.Errorf("a steady tick allocates %v times, want 0", a)
	}
	if a := testing.AllocsPerRun(50, func() { step(true) }); a != 0 {
		t.Errorf("a tick that re-runs 30 ticks allocates %v times, want 0", a)
	}
}

// BenchmarkRerunHour measures the re-run: a laboratory sample of the demo
// plant (1 s ticks, both demo gain sets, active and shadow) arriving an hour
// after it was drawn, with max_delay 1h, so that each tick re-runs 3,600
// ticks. It reports the ticks re-run per second of CPU.
func BenchmarkRerunHour(b *testing.B) {
	pl, gf := lateDemo(b, time.Hour)
	const hour = 3600
	feed := newLateFeed(b, pl, 4, hour+b.N+2)
	e := NewEngine(pl, engPrepare(b, pl, gf, "place-prediction"), EngineOptions{Candidate: engPrepare(b, pl, gf, "kalman-current")})
	est := e.NewEstimate()
	// The exchanger's samples all arrive an hour late; each one fills its
	// tick, so every tick re-runs the hour.
	tick := func(k int, late bool) {
		tk := engAt(float64(k))
		e.Offer(0, feed.u[k][0], tk, tk)
		e.Offer(1, feed.y[k][0], tk, tk)
		if late {
			e.Offer(2, feed.y[k-hour+1][1], engAt(float64(k-hour+1)), tk)
		}
		e.Tick(tk, est)
	}
	for k := 0; k < hour; k++ {
		tick(k, false)
	}
	b.ReportAllocs()
	start := lateCPU(b)
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		tick(hour+i, true)
	}
	b.StopTimer()
	if cpu := lateCPU(b) - start; cpu > 0 {
		b.ReportMetric(float64(b.N)*(hour-1)/cpu.Seconds(), "reruns/cpu-s")
	}
}

// lateCPU returns the CPU time the process has used.
func lateCPU(t testing.TB) time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		t.Fatal(err)
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}
