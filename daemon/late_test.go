package daemon

import (
	"bytes"
	"fmt"
	"math"
	"sort"
	"syscall"
	"testing"
	"time"

	"surmise/config"
	"surmise/daemon/recording"
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

// lateDemo loads the demo plant (the continuous hot-water loop, as surmise
// demo runs it) and its gains file; with maxDelay > 0, every signal gets that
// max_delay (and the outputs a max_age that lets such samples be used).
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
			for _, set := range []string{"poles-prediction", "kalman-current"} {
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
		e := NewEngine(pl, engPrepare(t, pl, gf, "poles-prediction"), EngineOptions{})
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
	e := NewEngine(pl, engPrepare(t, pl, gf, "poles-prediction"), EngineOptions{Candidate: engPrepare(t, pl, gf, "kalman-current")})
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
	e := NewEngine(pl, engPrepare(b, pl, gf, "poles-prediction"), EngineOptions{Candidate: engPrepare(b, pl, gf, "kalman-current")})
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

// TestReplayEqualsEngineWithLateArrivals drives one engine as the daemon
// does — each sample offered when it arrives, ticks at their due times —
// with every third tank sample arriving 1.3 periods after its own time and
// every fifth exchanger sample 2.6 periods after it, and writes the same
// arrivals to a bus recording; the replay of that recording must give the
// same estimates tick by tick, re-runs included.
func TestReplayEqualsEngineWithLateArrivals(t *testing.T) {
	pl, gf := lateDemo(t, 0) // max_delay: 3 s
	const ticks = 120
	feed := newLateFeed(t, pl, 8, ticks)
	type arrival struct {
		recv, at time.Time
		signal   int
		value    float64
	}
	var arrivals []arrival
	for k := 0; k < ticks; k++ {
		at := engAt(float64(k)).Add(-300 * time.Millisecond)
		arrivals = append(arrivals, arrival{at.Add(time.Millisecond), at, 0, feed.u[k][0]})
		d := []time.Duration{time.Millisecond, time.Millisecond}
		if k%3 == 0 {
			d[0] = 1300 * time.Millisecond
		}
		if k%5 == 0 {
			d[1] = 2600 * time.Millisecond
		}
		for j, v := range feed.y[k] {
			arrivals = append(arrivals, arrival{at.Add(d[j]), at, 1 + j, v})
		}
	}
	sort.SliceStable(arrivals, func(a, b int) bool { return arrivals[a].recv.Before(arrivals[b].recv) })

	prep := engPrepare(t, pl, gf, "poles-prediction")
	e := NewEngine(pl, prep, EngineOptions{})
	est := e.NewEstimate()
	var live []Estimate
	next := 0
	for k := 0; k < ticks; k++ {
		tk := engAt(float64(k))
		for ; next < len(arrivals) && !arrivals[next].recv.After(tk); next++ {
			a := arrivals[next]
			e.Offer(a.signal, a.value, a.at, a.recv)
		}
		e.Tick(tk, est)
		cp := *est
		cp.States = append([]StateEstimate(nil), est.States...)
		live = append(live, cp)
	}

	var b bytes.Buffer
	w := recording.NewWriter(&b)
	subjects := []string{pl.Inputs[0].Subject, pl.Outputs[0].Subject, pl.Outputs[1].Subject}
	for _, a := range arrivals {
		payload := fmt.Sprintf(`{"value": %v, "time": %q}`, a.value, a.at.Format(time.RFC3339Nano))
		if err := w.Write(a.recv, subjects[a.signal], []byte(payload)); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	br, err := recording.ReadJSONL(&b, "late.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	k := 0
	fused := 0
	_, err = Replay(pl, []*estimator.Prepared{prep}, NewBusSource(pl, br), ReplayOptions{
		Start: engAt(0), End: engAt(ticks - 1),
		Tick: func(_, _ int, r *Estimate) {
			if k >= len(live) {
				t.Fatalf("replay tick %d beyond the %d live ones", k, len(live))
			}
			l := &live[k]
			for _, o := range r.Outputs {
				fused += o.Late
			}
			if !r.Time.Equal(l.Time) || r.Status != l.Status {
				t.Fatalf("tick %d: replay %v %v, live %v %v", k, r.Time, r.Status, l.Time, l.Status)
			}
			for i := range l.States {
				if r.States[i].Value != l.States[i].Value || r.States[i].Std != l.States[i].Std {
					t.Fatalf("tick %d: state %d replayed %v ± %v, live %v ± %v", k, i,
						r.States[i].Value, r.States[i].Std, l.States[i].Value, l.States[i].Std)
				}
			}
			k++
		},
	})
	if err != nil {
		t.Fatal(err)
	}
	if k != ticks || fused < ticks/3 {
		t.Errorf("%d ticks replayed, %d late samples fused; want %d and at least %d", k, fused, ticks, ticks/3)
	}
}

// TestLabAnalysisFusedAtItsTime runs the invented brine tank of
// testdata/plants: an inline strength every minute, and a laboratory
// titration of a sample drawn at 08:00 whose result is published at 08:40
// with its own time (the plant file gives it max_delay: 1h). From 08:40 on
// the estimate is exactly the one of an engine that had the result at 08:00,
// and more certain than that of an engine that never had it.
func TestLabAnalysisFusedAtItsTime(t *testing.T) {
	pl, err := config.LoadPlant("../testdata/plants/brine-tank.yaml")
	if err != nil {
		t.Fatal(err)
	}
	gf, err := config.LoadGains(pl.GainsPath, pl)
	if err != nil {
		t.Fatal(err)
	}
	if got := pl.Outputs[1].MaxDelay; got != time.Hour {
		t.Fatalf("lab_strength max_delay %v, want 1h", got)
	}
	md := pl.Model
	sim := estimator.NewPlant(md, 21, nil)
	t0 := time.Date(2026, 1, 5, 6, 0, 0, 0, time.UTC)
	tickAt := func(k int) time.Time { return t0.Add(time.Duration(k) * time.Minute) }
	const drawn, published, ticks = 120, 160, 240 // 08:00, 08:40, 10:00
	engines := make([]*Engine, 3)                 // on time, late, never
	ests := make([]*Estimate, 3)
	for i := range engines {
		engines[i] = NewEngine(pl, engPrepare(t, pl, gf, "kalman-current"), EngineOptions{})
		ests[i] = engines[i].NewEstimate()
	}
	if h := engines[0].HorizonTicks(); h != 61 {
		t.Errorf("horizon %d ticks, want 61 (an hour of 1-minute ticks, and one)", h)
	}
	u, y := []float64{0.5}, make([]float64, 2)
	var lab float64
	for k := 0; k < ticks; k++ {
		tk := tickAt(k)
		u[0] = 0.5 + 0.1*math.Sin(float64(k)/15)
		sim.Step(u)
		sim.OutputTo(y)
		for i, e := range engines {
			e.Offer(0, u[0], tk, tk)
			e.Offer(1, y[0], tk, tk)
			if k == drawn {
				lab = y[1]
				if i == 0 {
					e.Offer(2, lab, tk, tk)
				}
			}
			if k == published && i == 1 {
				if r, ok := e.Offer(2, lab, tickAt(drawn), tk.Add(-time.Second)); !ok {
					t.Fatalf("the laboratory result was refused: %v", r)
				}
			}
			e.Tick(tk, ests[i])
		}
		if k < published {
			continue
		}
		on, late, never := ests[0], ests[1], ests[2]
		for i := range on.States {
			if on.States[i].Value != late.States[i].Value || on.States[i].Std != late.States[i].Std {
				t.Fatalf("%v: %s = %v ± %v with the result on time, %v ± %v with it 40 minutes late",
					tk.Format("15:04"), on.States[i].Name, on.States[i].Value, on.States[i].Std, late.States[i].Value, late.States[i].Std)
			}
		}
		if k == published && !(late.States[1].Std < never.States[1].Std) {
			t.Errorf("08:40: feed_strength ± %v with the result, ± %v without it: the analysis taught nothing", late.States[1].Std, never.States[1].Std)
		}
	}
}
