package daemon

import (
	"context"
	"math"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
)

// swapRecord is what one tick of a swap test showed: enough to recompute the
// two estimates it may have made.
type swapRecord struct {
	seq   uint64
	gains string
	x     [2]float64 // published state, absolute
	u, y  float64    // input held and measurement used at this tick
}

// swapCheck is the model arithmetic of the current form for the cart
// (Engine.Tick; estimator.Filter documents the same steps), done here by
// hand so that the test does not trust the code it checks:
//
//	x̂(k|k−1) = A·(x̂(k−1|k−1) − x0) + B·(u(k−1) − u0)
//	r        = (y(k) − y0) − C·x̂(k|k−1)
//	x̂(k|k)   = x̂(k|k−1) + L·r,  published as x0 + x̂(k|k).
type swapCheck struct {
	a, b, c      *mat.Dense
	x0, u0, y0   []float64
	lFast, lStdy [2]float64
}

func newSwapCheck(t testing.TB, plant *config.Plant) *swapCheck {
	md := plant.Model
	sc := &swapCheck{a: md.A, b: md.B, c: md.C, x0: md.X0, u0: md.U0, y0: md.Y0}
	for _, v := range []*[]float64{&sc.x0, &sc.u0, &sc.y0} {
		if *v == nil {
			*v = []float64{0, 0}
		}
	}
	for name, dst := range map[string]*[2]float64{"fast": &sc.lFast, "steady": &sc.lStdy} {
		l := cmSet(t, md, name).Set.Gains[0].L
		dst[0], dst[1] = l.At(0, 0), l.At(1, 0)
	}
	return sc
}

// next returns the published state after prev with the gain l.
func (sc *swapCheck) next(prev, cur swapRecord, l [2]float64) [2]float64 {
	var xm [2]float64
	for i := 0; i < 2; i++ {
		xm[i] = sc.a.At(i, 0)*(prev.x[0]-sc.x0[0]) + sc.a.At(i, 1)*(prev.x[1]-sc.x0[1]) +
			sc.b.At(i, 0)*(prev.u-sc.u0[0])
	}
	r := (cur.y - sc.y0[0]) - (sc.c.At(0, 0)*xm[0] + sc.c.At(0, 1)*xm[1])
	return [2]float64{sc.x0[0] + xm[0] + l[0]*r, sc.x0[1] + xm[1] + l[1]*r}
}

// verify checks every tick after the first against the two possible
// results: the fast gain's and the steady gain's, from the previous tick's
// published state. It returns the number of ticks whose gain set differed
// from the previous tick's (swaps seen) and of ticks where the two results
// were too close to tell apart.
func (sc *swapCheck) verify(t testing.TB, recs []swapRecord) (swaps, ambiguous int) {
	t.Helper()
	const tol = 1e-9 // the hand arithmetic and the filter's loops round differently
	bad := 0
	for k := 1; k < len(recs); k++ {
		prev, cur := recs[k-1], recs[k]
		if cur.seq != prev.seq+1 {
			t.Errorf("tick %d: sequence %d after %d: a tick was lost", k, cur.seq, prev.seq)
		}
		xf, xs := sc.next(prev, cur, sc.lFast), sc.next(prev, cur, sc.lStdy)
		near := func(a [2]float64) bool {
			return math.Abs(a[0]-cur.x[0]) <= tol*(1+math.Abs(a[0])) && math.Abs(a[1]-cur.x[1]) <= tol*(1+math.Abs(a[1]))
		}
		isF, isS := near(xf), near(xs)
		if isF && isS {
			ambiguous++
		}
		var want string
		switch {
		case isF && !isS:
			want = "fast"
		case isS && !isF:
			want = "steady"
		}
		if !isF && !isS || want != "" && want != cur.gains {
			bad++
			if bad <= 5 {
				t.Errorf("tick %d (%s): x = %v, fast would give %v, steady %v: not one set's result", k, cur.gains, cur.x, xf, xs)
			}
		}
		if cur.gains != prev.gains {
			swaps++
			// Continuity: the swap tick moves the estimate no further
			// than the larger of the two filter steps would.
			step := math.Hypot(cur.x[0]-prev.x[0], cur.x[1]-prev.x[1])
			bound := math.Max(math.Hypot(xf[0]-prev.x[0], xf[1]-prev.x[1]), math.Hypot(xs[0]-prev.x[0], xs[1]-prev.x[1]))
			if step > bound*(1+1e-9)+1e-12 {
				t.Errorf("tick %d: swap %s → %s moved the estimate by %v, the filter alone by at most %v", k, prev.gains, cur.gains, step, bound)
			}
		}
	}
	if bad > 5 {
		t.Errorf("%d ticks in all were not one set's result", bad)
	}
	return swaps, ambiguous
}

// swapRig is a cart rig running "fast" with "steady" as the previous set,
// so that every Rollback swaps the two, and no dwell time.
func newSwapRig(t testing.TB, sample string) *cmRig {
	// Without an initial covariance the fixed gains start settled, with no
	// acquisition (estimator.Filter): every tick is one set's arithmetic.
	r := newCMRig(t, cmRigOptions{repl: []string{"sample: 100ms", "sample: " + sample, "initial:\n  std: [2, 1]\n", ""}, active: "steady", dwell: -1, seed: 11,
		sets: []string{"steady", "fast"}})
	if _, err := r.c.Load(cmGains(t, r.plant, "fast", "", "steady", "fast"), "test", Selection{}, TriggerControl, Origin{}); err != nil {
		t.Fatal(err)
	}
	return r
}

// record runs one tick of the rig at time at and records it.
func (r *cmRig) tickAt(at time.Time) {
	r.u[0] = 0.5 * math.Sin(0.05*float64(r.k))
	r.sim.Step(r.u)
	r.sim.OutputTo(r.y)
	r.eng.Offer(0, r.u[0], at, at)
	r.eng.Offer(1, r.y[0], at, at)
	r.eng.Tick(at, r.est)
	r.c.observe(r.est, nil)
	r.k++
}

func (r *cmRig) record() swapRecord {
	return swapRecord{seq: r.est.Seq, gains: r.est.Gains, x: [2]float64{r.est.States[0].Value, r.est.States[1].Value}, u: r.u[0], y: r.y[0]}
}

// TestSwapVirtualTime swaps the active set 1,000 times from another
// goroutine while the cart ticks in virtual time at 1 kHz, and checks every
// tick's estimate is exactly one set's result from the previous estimate —
// never a blend, never half of one set and half of the other — with no tick
// lost and no jump at a swap beyond the filter's own step. Each swap is
// asked for while the next tick runs (Rollback and Tick race), and the tick
// after that waits for it, so every swap lands at its own tick boundary and
// all 1,000 show in the estimates.
func TestSwapVirtualTime(t *testing.T) {
	r := newSwapRig(t, "1ms")
	const swapsWanted = 1000
	kick, ack := make(chan struct{}), make(chan struct{})
	go func() {
		for range kick {
			if _, err := r.c.Rollback(Origin{Who: "test"}); err != nil {
				t.Error(err)
			}
			ack <- struct{}{}
		}
	}()
	t0 := time.Unix(1_800_000_000, 0)
	var recs []swapRecord
	for k := 0; k < 2*swapsWanted+2; k++ {
		r.tickAt(t0.Add(time.Duration(k) * time.Millisecond))
		recs = append(recs, r.record())
		switch {
		case k >= 2*swapsWanted:
		case k%2 == 0:
			kick <- struct{}{}
		default:
			<-ack
		}
	}
	close(kick)
	swaps, ambiguous := newSwapCheck(t, r.plant).verify(t, recs)
	t.Logf("%d ticks, %d swaps seen in the estimates, %d ticks where both sets agree", len(recs), swaps, ambiguous)
	if swaps != swapsWanted {
		t.Errorf("%d swaps seen in the estimates, want %d", swaps, swapsWanted)
	}
	if ambiguous > len(recs)/100 {
		t.Errorf("%d of %d ticks cannot tell the two sets apart: the test proves little", ambiguous, len(recs))
	}
}

// TestSwapRealScheduler runs the cart on the real tick scheduler at 1 kHz
// for about 1.5 s while another goroutine swaps the active set after every
// tick it sees, and checks the ticks as TestSwapVirtualTime does. Ticks the
// scheduler skips because the machine is loaded are counted and reported
// (they are the scheduler's, not the swap's); within the engine no tick is
// lost: every delivered tick advances the sequence by one.
func TestSwapRealScheduler(t *testing.T) {
	if testing.Short() {
		t.Skip("runs 1.5 s of real time")
	}
	r := newSwapRig(t, "1ms")
	const ticksWanted, swapsWanted = 1500, 1000
	recs := make([]swapRecord, 0, 4*ticksWanted)
	var mu sync.Mutex // guards recs and missed (the job runs on a worker)
	var missed uint64
	var ticks, swaps atomic.Int64
	kick := make(chan struct{}, 1)
	s := NewScheduler(SchedulerOptions{})
	s.Add("cart", time.Millisecond, func(tk Tick) {
		r.tickAt(tk.Due)
		mu.Lock()
		if len(recs) < cap(recs) {
			recs = append(recs, r.record())
		}
		missed += tk.Missed
		mu.Unlock()
		ticks.Add(1)
		select {
		case kick <- struct{}{}:
		default:
		}
	})
	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	wg.Add(2)
	go func() {
		defer wg.Done()
		if err := s.Run(ctx); err != nil {
			t.Error(err)
		}
	}()
	go func() {
		defer wg.Done()
		for {
			select {
			case <-ctx.Done():
				return
			case <-kick:
			}
			if swaps.Load() >= swapsWanted {
				continue
			}
			if _, err := r.c.Rollback(Origin{Who: "test"}); err != nil {
				t.Error(err)
				return
			}
			swaps.Add(1)
		}
	}()
	deadline := time.Now().Add(time.Minute)
	for ticks.Load() < ticksWanted || swaps.Load() < swapsWanted {
		if time.Now().After(deadline) {
			break
		}
		select {
		case <-time.After(10 * time.Millisecond): // poll
		case <-ctx.Done():
		}
	}
	cancel()
	wg.Wait()
	if ticks.Load() < ticksWanted || swaps.Load() < swapsWanted {
		t.Fatalf("after a minute: %d ticks, %d swaps", ticks.Load(), swaps.Load())
	}
	mu.Lock()
	defer mu.Unlock()
	seen, ambiguous := newSwapCheck(t, r.plant).verify(t, recs)
	t.Logf("%d ticks (%d skipped by the scheduler under load), %d swaps asked for, %d seen in the estimates, %d ambiguous ticks", len(recs), missed, swaps.Load(), seen, ambiguous)
	if seen < 100 {
		t.Errorf("only %d swaps seen in the estimates", seen)
	}
}
