package daemon_test

import (
	"bytes"
	"context"
	"math"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
	"surmise/daemon/recording"
	"surmise/daemon/simplant"
	"surmise/estimator"
)

// rpLiveTick is a live estimate as the daemon's listener saw it.
type rpLiveTick struct {
	time         time.Time
	seq          uint64
	status       string
	states, stds []float64
	nis, nisMean float64
	used         estimator.Pattern
	innovations  []float64
	late         int // output samples fused this tick after their own tick had run
}

func rpCopy(est *daemon.Estimate) rpLiveTick {
	tk := rpLiveTick{time: est.Time.Round(0), seq: est.Seq, status: est.Status.String(), nis: est.NIS, nisMean: est.NISMean, used: est.Used}
	for _, s := range est.States {
		tk.states, tk.stds = append(tk.states, s.Value), append(tk.stds, s.Std)
	}
	for _, o := range est.Outputs {
		tk.innovations = append(tk.innovations, o.Innovation)
		tk.late += o.Late
	}
	return tk
}

// rpClose reports whether a and b agree to floating-point tolerance (both
// NaN counts as agreeing).
func rpClose(a, b float64) bool {
	if math.IsNaN(a) || math.IsNaN(b) {
		return math.IsNaN(a) && math.IsNaN(b)
	}
	return math.Abs(a-b) <= 1e-9*math.Max(1, math.Max(math.Abs(a), math.Abs(b)))
}

// TestReplayEqualsLive runs the daemon on the demo plant while the
// simulated plant publishes a scenario with every kind of event and a
// recorder records the bus, then replays the recording with the same gain
// set from the live run's first tick: the replay must give the live
// estimates tick by tick. The plant and the daemon run five times faster
// than real time (a tick every 200 ms), and the plant publishes half a
// tick after the daemon's ticks, so that every sample arrives well inside
// the interval of the tick it belongs to, for the daemon and the recorder
// alike (the recorder's receive times are not the daemon's own).
//
// Late arrivals are part of it: for six ticks a second exchanger sample is
// published beside the plant's, dated two ticks earlier (three quarters into
// that interval, so newer than the plant's sample of it), as a sensor whose
// messages take two periods would send it. It arrives after its own tick has
// run, for the daemon and the recorder alike, and both fuse it there by a
// re-run; so the ticks after it must agree too.
func TestReplayEqualsLive(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the daemon for about 8 s")
	}
	const speed = 5
	spec := demoPlant(t, 0)
	plant, gains := simplant.TimeScaled(spec.Plant, spec.Gains, speed)
	ts := time.Duration(plant.Model.Ts * float64(time.Second))
	sc, err := simplant.ParseScenario("live.yaml", []byte(`
length: 40s
events:
  - {at: 0s, prbs: heater_power, low: 4.5, high: 7.5, hold: 3s, for: 20s}
  - {at: 20s, step: heater_power, value: 7}
  - {at: 4s, dropout: tank_outlet, for: 4s}
  - {at: 10s, bias: hx_outlet, value: 1.5, for: 8s}
  - {at: 21s, spikes: tank_outlet, value: 3, count: 2, every: 3s}
  - {at: 27s, slow: hx_outlet, ticks: 3, for: 9s}
  - {at: 30s, jitter: all, max: 250ms, for: 6s}
  - {at: 32s, dropout: heater_power, for: 6s}
`), spec.Plant)
	if err != nil {
		t.Fatal(err)
	}

	r := startDaemon(t, daemon.Options{
		Plants:         []daemon.PlantSpec{{Plant: plant, Gains: gains}},
		Bus:            daemon.BusOptions{},
		EmbeddedPort:   -1,
		StateDir:       t.TempDir(),
		Logger:         discardLogger(),
		ReloadDebounce: -1,
	})
	var mu sync.Mutex
	var live []rpLiveTick
	remove := r.d.OnEstimate(func(_ *daemon.Estimator, est *daemon.Estimate, _ []byte) {
		tk := rpCopy(est)
		mu.Lock()
		live = append(live, tk)
		mu.Unlock()
	})
	defer remove()

	// The recorder subscribes to the plant's subjects: the local user's
	// right, not an anonymous client's.
	nc := connectLocal(t, r)
	var rec bytes.Buffer
	recorder, err := daemon.StartRecorder(nc, recording.NewWriter(&rec), []string{"pilot.hwl.>", "surmise.hotwater-loop.truth.>"})
	if err != nil {
		t.Fatal(err)
	}
	// The first live tick fixes the phase of the ticks.
	var first time.Time
	checkFor(t, 10*time.Second, time.Millisecond, func() error {
		mu.Lock()
		defer mu.Unlock()
		if len(live) == 0 {
			return errNoTick
		}
		first = live[0].time
		return nil
	})
	k := time.Until(first)/ts + 2 // a tick at least one period ahead
	start := first.Add(k*ts + ts/2)

	sim, err := simplant.New(spec.Plant, sc, simplant.Options{Seed: 17})
	if err != nil {
		t.Fatal(err)
	}
	// The late exchanger samples: near the plant's latest, published just
	// after the plant's sample of ticks 12 to 17 of the run.
	hx := plant.Outputs[1]
	var lastHX atomic.Uint64
	hxSub, err := nc.Subscribe(hx.Subject, func(m *nats.Msg) {
		if v, _, err := daemon.DecodeSample(m.Data, time.Now()); err == nil {
			lastHX.Store(math.Float64bits(v))
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	lateDone := make(chan struct{})
	go func() {
		defer close(lateDone)
		for i := 12; i < 18; i++ {
			at := start.Add(time.Duration(i)*ts + ts/10)
			time.Sleep(time.Until(at)) // pacing a publisher, not waiting for a condition
			stamp := start.Add(time.Duration(i-2)*ts + ts/4)
			v := math.Float64frombits(lastHX.Load()) + 0.02
			nc.Publish(hx.Subject, simplant.AppendPayload(nil, v, stamp))
		}
	}()
	plantTime := 40 * time.Second
	if _, err := simplant.Publish(context.Background(), nc, simplant.NewStream(sim), simplant.PublishOptions{
		Clock: simplant.Clock{Start: start, Speed: speed},
		For:   plantTime,
	}); err != nil {
		t.Fatal(err)
	}
	// Wait for the tick after the last sample, then stop everything.
	end := start.Add(plantTime/speed + ts)
	checkFor(t, 10*time.Second, 5*time.Millisecond, func() error {
		mu.Lock()
		defer mu.Unlock()
		if live[len(live)-1].time.Before(end) {
			return errNoTick
		}
		return nil
	})
	<-lateDone
	hxSub.Unsubscribe()
	if err := recorder.Stop(); err != nil {
		t.Fatal(err)
	}
	remove()
	mu.Lock()
	got := append([]rpLiveTick(nil), live...)
	mu.Unlock()

	br, err := recording.ReadJSONL(&rec, "live.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	if len(br.Issues) != 0 {
		t.Fatalf("recording issues: %v", br.Issues)
	}
	prep, err := estimator.Prepare(plant.Model, gains.Set(gains.Active).Set, plant.Gate)
	if err != nil {
		t.Fatal(err)
	}
	var replayed []rpLiveTick
	src := daemon.NewBusSource(plant, br)
	res, err := daemon.Replay(plant, []*estimator.Prepared{prep}, src, daemon.ReplayOptions{
		Start: got[0].time,
		End:   got[len(got)-1].time,
		Tick:  func(_, _ int, est *daemon.Estimate) { replayed = append(replayed, rpCopy(est)) },
	})
	if err != nil {
		t.Fatal(err)
	}
	if len(res.Issues) != 0 {
		t.Errorf("replay issues: %v", res.Issues)
	}
	if len(replayed) != len(got) {
		t.Fatalf("%d replayed ticks, %d live (a live tick missed?)", len(replayed), len(got))
	}
	statuses := map[string]int{}
	lateFused := 0
	for k := range got {
		g, w := replayed[k], got[k]
		statuses[w.status]++
		lateFused += w.late
		if !g.time.Equal(w.time) || g.seq != w.seq || g.status != w.status || g.used != w.used || !rpClose(g.nis, w.nis) || !rpClose(g.nisMean, w.nisMean) || g.late != w.late {
			t.Fatalf("tick %d: replay %v #%d %s used %b NIS %v (mean %v) late %d, live %v #%d %s used %b NIS %v (mean %v) late %d",
				k, g.time, g.seq, g.status, g.used, g.nis, g.nisMean, g.late, w.time, w.seq, w.status, w.used, w.nis, w.nisMean, w.late)
		}
		for i := range w.states {
			if !rpClose(g.states[i], w.states[i]) || !rpClose(g.stds[i], w.stds[i]) {
				t.Fatalf("tick %d: state %d replayed %v ± %v, live %v ± %v", k, i, g.states[i], g.stds[i], w.states[i], w.stds[i])
			}
		}
		for j := range w.innovations {
			if !rpClose(g.innovations[j], w.innovations[j]) {
				t.Fatalf("tick %d: innovation %d replayed %v, live %v", k, j, g.innovations[j], w.innovations[j])
			}
		}
	}
	// The scenario must have shown more than one status, or the comparison
	// proved little: stale input before the plant starts and during the
	// heater's dropout, tracking otherwise.
	if statuses["tracking"] == 0 || statuses["stale-input"] == 0 {
		t.Errorf("statuses %v: want tracking and stale-input ticks", statuses)
	}
	if lateFused != 6 {
		t.Errorf("%d late samples fused at their own tick, want the 6 published late", lateFused)
	}
	t.Logf("%d ticks compared; statuses %v; %d late samples fused; %d messages recorded", len(got), statuses, lateFused, len(br.Messages))
}

var errNoTick = errorString("no such tick yet")

type errorString string

func (e errorString) Error() string { return string(e) }
