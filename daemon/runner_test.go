package daemon

import (
	"path/filepath"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"surmise/config"
)

// dmnDemoDaemon returns a daemon of the demo plant that has not been run.
func dmnDemoDaemon(t *testing.T) *Daemon {
	t.Helper()
	plant, err := config.LoadPlant(filepath.Join("..", "testdata", "plants", "hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		t.Fatal(err)
	}
	d, err := New(Options{Plants: []PlantSpec{{Plant: plant, Gains: gains}}, Registry: prometheus.NewRegistry()})
	if err != nil {
		t.Fatal(err)
	}
	return d
}

// TestTickAllocs asserts that a tick — engine, JSON, metrics, the
// listeners (the live page's, and one more) — allocates nothing (the bus is
// not connected here; the NATS client's Publish is measured elsewhere at
// about one allocation).
func TestTickAllocs(t *testing.T) {
	d := dmnDemoDaemon(t)
	e := d.estimators[0]
	t0 := time.Now()
	k := 0
	tick := func() {
		k++
		due := t0.Add(time.Duration(k) * e.period)
		e.tick(Tick{Seq: uint64(k), Due: due, Start: due})
	}
	tick() // sizes the JSON buffer
	if a := testing.AllocsPerRun(200, tick); a != 0 {
		t.Errorf("a tick allocates %v times, want 0", a)
	}
	var got int
	remove := d.OnEstimate(func(*Estimator, *Estimate, []byte) { got++ })
	if a := testing.AllocsPerRun(200, tick); a != 0 {
		t.Errorf("a tick with one more listener allocates %v times, want 0", a)
	}
	remove()
	remove() // a second call does nothing
	before := got
	tick()
	if got != before || got < 200 {
		t.Errorf("listener called %d times, %d after its removal; want ≥ 200 and none after", before, got-before)
	}
}

// TestOnEstimateListeners checks that every listener sees every tick, and
// that removing one leaves the others.
func TestOnEstimateListeners(t *testing.T) {
	d := dmnDemoDaemon(t)
	e := d.estimators[0]
	count := func() int {
		if ls := d.listeners.Load(); ls != nil {
			return len(*ls)
		}
		return 0
	}
	had := count() // the live page's
	var a, b []uint64
	removeA := d.OnEstimate(func(_ *Estimator, est *Estimate, payload []byte) { a = append(a, est.Seq) })
	removeB := d.OnEstimate(func(_ *Estimator, est *Estimate, payload []byte) { b = append(b, est.Seq) })
	t0 := time.Now()
	for k := 1; k <= 3; k++ {
		e.tick(Tick{Seq: uint64(k), Due: t0.Add(time.Duration(k) * e.period)})
		if k == 2 {
			removeA()
		}
	}
	removeB()
	if len(a) != 2 || len(b) != 3 || a[1] != 2 || b[2] != 3 {
		t.Errorf("listener A saw %v, B %v; want [1 2] and [1 2 3]", a, b)
	}
	if n := count(); n != had {
		t.Errorf("%d listeners after both were removed, want %d", n, had)
	}
}

func BenchmarkTick(b *testing.B) {
	plant, err := config.LoadPlant(filepath.Join("..", "testdata", "plants", "hotwater-loop.yaml"))
	if err != nil {
		b.Fatal(err)
	}
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		b.Fatal(err)
	}
	d, err := New(Options{Plants: []PlantSpec{{Plant: plant, Gains: gains}}, Registry: prometheus.NewRegistry()})
	if err != nil {
		b.Fatal(err)
	}
	e := d.estimators[0]
	t0 := time.Now()
	b.ReportAllocs()
	for k := 1; b.Loop(); k++ {
		due := t0.Add(time.Duration(k) * e.period)
		e.tick(Tick{Seq: uint64(k), Due: due, Start: due})
	}
}

// TestHealthy checks the stall rule of Healthy and /healthz's oldestTick on
// a daemon whose clock readings are set by hand: the demo plant ticks every
// second, so a stall is 3 s without a tick.
func TestHealthy(t *testing.T) {
	d := dmnDemoDaemon(t)
	e := d.estimators[0]
	if err := d.Healthy(); err == nil {
		t.Error("healthy before Run")
	}
	d.epoch = d.epoch.Add(-time.Hour) // room for readings in the past
	now := d.now()
	d.started.Store(now - int64(10*time.Second))
	if err := d.Healthy(); err != nil {
		t.Errorf("starting (no scheduler yet): %v, want healthy", err)
	}
	for _, tc := range []struct {
		name            string
		scheduled, last time.Duration // before now; last 0: no tick yet
		healthy         bool
	}{
		{"first tick due", 2 * time.Second, 0, true},
		{"no first tick for 4 s", 4 * time.Second, 0, false},
		{"ticked 2 s ago", 60 * time.Second, 2 * time.Second, true},
		{"no tick for 4 s", 60 * time.Second, 4 * time.Second, false},
	} {
		now := d.now()
		d.scheduled.Store(now - int64(tc.scheduled))
		e.lastTick.Store(0)
		if tc.last > 0 {
			e.lastTick.Store(now - int64(tc.last))
		}
		err := d.Healthy()
		if (err == nil) != tc.healthy {
			t.Errorf("%s: Healthy() = %v, want healthy %v", tc.name, err, tc.healthy)
		}
		want := tc.last
		if want == 0 {
			want = tc.scheduled
		}
		if age := time.Since(d.oldestTick()); age < want || age > want+time.Second {
			t.Errorf("%s: oldestTick is %v ago, want %v", tc.name, age, want)
		}
	}
}
