package daemon

import (
	"fmt"
	"math"
	"strings"
	"surmise/estimator"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
)

func newTestMetrics(t *testing.T) (*prometheus.Registry, *Metrics, *EstimatorMetrics) {
	t.Helper()
	reg := prometheus.NewPedanticRegistry()
	m := NewMetrics(reg)
	e := m.Estimator("loop", []string{"t_tank", "t_hx"}, []string{"t_heater", "loss"},
		[]string{"power", "t_tank", "t_hx"}, "kalman")
	return reg, m, e
}

func TestMetricsLint(t *testing.T) {
	reg, m, e := newTestMetrics(t)
	if err := RegisterRuntime(reg); err != nil {
		t.Fatal(err)
	}
	e.ObserveTick(StatusTracking, time.Millisecond, time.Millisecond, 1)
	e.Primary().SetInfo("current", "ab12")
	e.GainReload(true)
	m.SetBusConnected(true)
	problems, err := testutil.GatherAndLint(reg)
	if err != nil {
		t.Fatal(err)
	}
	for _, p := range problems {
		t.Errorf("lint: %s: %s", p.Metric, p.Text)
	}
	if err := RegisterRuntime(reg); err == nil {
		t.Error("registering the runtime collectors twice succeeded, want an error")
	}
}

// TestMetricsExposition compares the exposition after a few updates with
// text written by hand from the rules of the Prometheus text format: a
// histogram's buckets are cumulative and "le" is inclusive (an observation
// equal to a bound counts in that bucket), _sum is the sum of the
// observations and _count their number. Observations are binary fractions so
// that the sums are exact.
func TestMetricsExposition(t *testing.T) {
	reg, m, e := newTestMetrics(t)
	e.ObserveTick(StatusTracking, 0, 0, 0)
	e.ObserveTick(StatusCoasting, 250*time.Millisecond, 0, 2)
	e.ObserveTick(StatusTracking, 500*time.Millisecond, 0, 0)
	e.SampleReceived(1)
	e.SampleReceived(1)
	e.SampleRejected(1, ReasonRange)
	g := e.Primary()
	g.SetInnovation(0, -0.25, 0.5)
	g.SetStates([]float64{71.5, -120}, []float64{0.75, 10})
	g.SetInfo("prediction", "00ff")
	g.SetInfo("current", "ab12") // replaces the first
	m.SetBusConnected(true)
	m.BusDisconnected()

	const want = `
# HELP surmise_bus_connected 1 while connected to the NATS server.
# TYPE surmise_bus_connected gauge
surmise_bus_connected 1
# HELP surmise_bus_disconnects_total Disconnections from the NATS server.
# TYPE surmise_bus_disconnects_total counter
surmise_bus_disconnects_total 1
# HELP surmise_gains_info Gain sets in use, with their form and model fingerprint; always 1.
# TYPE surmise_gains_info gauge
surmise_gains_info{estimator="loop",fingerprint="ab12",form="current",gains="kalman"} 1
# HELP surmise_innovation Latest innovation (measurement minus predicted output), in output units.
# TYPE surmise_innovation gauge
surmise_innovation{estimator="loop",gains="kalman",output="t_hx"} NaN
surmise_innovation{estimator="loop",gains="kalman",output="t_tank"} -0.25
# HELP surmise_nis Normalised innovation squared of the latest corrected tick.
# TYPE surmise_nis gauge
surmise_nis{estimator="loop",gains="kalman"} NaN
# HELP surmise_samples_received_total Samples received from the bus.
# TYPE surmise_samples_received_total counter
surmise_samples_received_total{estimator="loop",signal="power"} 0
surmise_samples_received_total{estimator="loop",signal="t_hx"} 0
surmise_samples_received_total{estimator="loop",signal="t_tank"} 2
# HELP surmise_state Estimated state, absolute value in state units.
# TYPE surmise_state gauge
surmise_state{estimator="loop",gains="kalman",state="loss"} -120
surmise_state{estimator="loop",gains="kalman",state="t_heater"} 71.5
# HELP surmise_status 1 for the status of the latest tick, 0 for the others.
# TYPE surmise_status gauge
surmise_status{estimator="loop",status="coasting"} 0
surmise_status{estimator="loop",status="diverged"} 0
surmise_status{estimator="loop",status="stale-input"} 0
surmise_status{estimator="loop",status="suspect"} 0
surmise_status{estimator="loop",status="tracking"} 1
# HELP surmise_tick_lateness_seconds Time from a tick's due time on the schedule to its start.
# TYPE surmise_tick_lateness_seconds histogram
surmise_tick_lateness_seconds_bucket{estimator="loop",le="1e-05"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="2.5e-05"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="5e-05"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.0001"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.00025"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.0005"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.001"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.0025"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.005"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.01"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.025"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.05"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.1"} 1
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.25"} 2
surmise_tick_lateness_seconds_bucket{estimator="loop",le="0.5"} 3
surmise_tick_lateness_seconds_bucket{estimator="loop",le="1"} 3
surmise_tick_lateness_seconds_bucket{estimator="loop",le="2.5"} 3
surmise_tick_lateness_seconds_bucket{estimator="loop",le="5"} 3
surmise_tick_lateness_seconds_bucket{estimator="loop",le="10"} 3
surmise_tick_lateness_seconds_bucket{estimator="loop",le="+Inf"} 3
surmise_tick_lateness_seconds_sum{estimator="loop"} 0.75
surmise_tick_lateness_seconds_count{estimator="loop"} 3
# HELP surmise_tick_overruns_total Ticks missed because the previous tick was still running or the scheduler woke a period or more late.
# TYPE surmise_tick_overruns_total counter
surmise_tick_overruns_total{estimator="loop"} 2
# HELP surmise_ticks_total Ticks run, by the status of the tick.
# TYPE surmise_ticks_total counter
surmise_ticks_total{estimator="loop",status="coasting"} 1
surmise_ticks_total{estimator="loop",status="diverged"} 0
surmise_ticks_total{estimator="loop",status="stale-input"} 0
surmise_ticks_total{estimator="loop",status="suspect"} 0
surmise_ticks_total{estimator="loop",status="tracking"} 2
`
	if err := testutil.GatherAndCompare(reg, strings.NewReader(want),
		"surmise_bus_connected", "surmise_bus_disconnects_total", "surmise_gains_info", "surmise_innovation",
		"surmise_nis", "surmise_samples_received_total", "surmise_state", "surmise_status",
		"surmise_tick_lateness_seconds", "surmise_tick_overruns_total", "surmise_ticks_total"); err != nil {
		t.Error(err)
	}
	// One rejection counter per signal and reason: 3 × 6.
	if n, err := testutil.GatherAndCount(reg, "surmise_samples_rejected_total"); err != nil || n != 3*int(numReasons) {
		t.Errorf("surmise_samples_rejected_total has %d series (%v), want %d", n, err, 3*int(numReasons))
	}
	if v := testutil.ToFloat64(m.rejected.WithLabelValues("loop", "t_tank", "range")); v != 1 {
		t.Errorf("rejected{t_tank, range} = %v, want 1", v)
	}
}

// seriesOf counts the gathered series whose labels include all of want.
func seriesOf(t *testing.T, reg prometheus.Gatherer, want map[string]string) int {
	t.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	for _, mf := range mfs {
		for _, mt := range mf.GetMetric() {
			match := 0
			for _, lp := range mt.GetLabel() {
				if v, ok := want[lp.GetName()]; ok && v == lp.GetValue() {
					match++
				}
			}
			if match == len(want) {
				n++
			}
		}
	}
	return n
}

// TestMetricsRemove removes a shadow gain set and then an estimator, at both
// levels: their own series go, the other estimator's and the series of the
// whole process (summary level) stay.
func TestMetricsRemove(t *testing.T) {
	for _, level := range []MetricsLevel{MetricsFull, MetricsSummary} {
		t.Run(level.String(), func(t *testing.T) {
			reg := prometheus.NewPedanticRegistry()
			m := NewMetricsLevel(reg, level)
			loop := m.Estimator("loop", []string{"t_tank", "t_hx"}, []string{"t_heater", "loss"},
				[]string{"power", "t_tank", "t_hx"}, "kalman")
			dryer := m.Estimator("dryer", []string{"rh"}, []string{"moisture"}, []string{"rh"}, "placed")
			loop.Primary().SetInfo("current", "ab12")
			loop.Primary().SetInfo("current", "ab13") // replaces the first
			shadow := loop.Gains("candidate")
			shadow.SetInfo("prediction", "ab13")
			shadow.SetStates([]float64{1, 2}, nil)
			whole := seriesOf(t, reg, map[string]string{"estimator": ""})
			if level == MetricsSummary && whole == 0 {
				t.Fatal("no series of the whole process")
			}

			if n := seriesOf(t, reg, map[string]string{"estimator": "loop", "gains": "candidate"}); n == 0 {
				t.Fatal("no series for the shadow gain set")
			}
			if n := seriesOf(t, reg, map[string]string{"estimator": "loop", "fingerprint": "ab12"}); n != 0 {
				t.Errorf("%d gains info series of the replaced fingerprint", n)
			}
			shadow.Remove()
			if n := seriesOf(t, reg, map[string]string{"estimator": "loop", "gains": "candidate"}); n != 0 {
				t.Errorf("%d series of the shadow gain set left after its Remove", n)
			}
			if n := seriesOf(t, reg, map[string]string{"estimator": "loop", "gains": "kalman"}); n == 0 {
				t.Error("GainsMetrics.Remove deleted the primary gain set too")
			}

			before := seriesOf(t, reg, map[string]string{"estimator": "dryer"})
			loop.Remove()
			if n := seriesOf(t, reg, map[string]string{"estimator": "loop"}); n != 0 {
				t.Errorf("%d series of the removed estimator left", n)
			}
			if n := seriesOf(t, reg, map[string]string{"estimator": "dryer"}); n != before || n == 0 {
				t.Errorf("the other estimator has %d series after Remove, want %d", n, before)
			}
			if n := seriesOf(t, reg, map[string]string{"estimator": ""}); n != whole {
				t.Errorf("%d series of the whole process after Remove, want %d", n, whole)
			}
			dryer.ObserveTick(StatusCoasting, 0, 0, 0) // still usable
		})
	}
}

// BenchmarkMetricsBindRemove binds the series of one more estimator, sets
// its gains info twice and removes it, next to 10,000 others: its cost must
// not grow with the others (it did when series were deleted by a partial
// label match, which scans every series of a vector: about 10 ms per call
// at 10,000 estimators).
func BenchmarkMetricsBindRemove(b *testing.B) {
	m := NewMetricsLevel(prometheus.NewRegistry(), MetricsSummary)
	outs, states, sigs := []string{"y1", "y2"}, []string{"x1", "x2", "x3"}, []string{"u1", "y1", "y2"}
	for i := range 10000 {
		m.Estimator(fmt.Sprintf("e%05d", i), outs, states, sigs, "kalman").Primary().SetInfo("current", "ab12")
	}
	b.ReportAllocs()
	for b.Loop() {
		e := m.Estimator("extra", outs, states, sigs, "kalman")
		e.Primary().SetInfo("current", "ab12")
		e.Primary().SetInfo("current", "ab13")
		e.Remove()
	}
}

func TestMetricsTickAllocatesNothing(t *testing.T) {
	_, _, e := newTestMetrics(t)
	g := e.Primary()
	x, sd := []float64{70, 0.1}, []float64{0.5, 0.01}
	statuses := []Status{StatusTracking, StatusCoasting, StatusSuspect, StatusStaleInput}
	k := 0
	allocs := testing.AllocsPerRun(1000, func() {
		// Everything the engine updates on one tick.
		e.ObserveTick(statuses[k%len(statuses)], 120*time.Microsecond, 35*time.Microsecond, uint64(k%2))
		e.SampleReceived(1)
		e.SampleRejected(2, ReasonStale)
		e.SetMeasurementAge(0, 3*time.Millisecond)
		e.ObserveSampleToEstimate(4 * time.Millisecond)
		g.SetInnovation(0, 0.1, 0.2)
		g.SetInnovation(1, -0.1, 0.3)
		g.Outlier(1)
		g.SetNIS(1.2, 0.9, k%3 == 0)
		g.SetNISBand(0.65, 1.43)
		g.SetStates(x, sd)
		k++
	})
	if allocs != 0 {
		t.Errorf("one tick's metric updates allocate %v times, want 0", allocs)
	}
}

func BenchmarkEstimatorMetricsTick(b *testing.B) {
	m := NewMetrics(prometheus.NewRegistry())
	e := m.Estimator("loop", []string{"t_tank", "t_hx"}, []string{"t_heater", "t_wall", "loss"},
		[]string{"power", "t_tank", "t_hx"}, "kalman")
	g := e.Primary()
	x, sd := []float64{70, 40, 0.1}, []float64{0.5, 0.4, 0.01}
	b.ReportAllocs()
	for b.Loop() {
		e.ObserveTick(StatusTracking, 120*time.Microsecond, 35*time.Microsecond, 0)
		e.SetMeasurementAge(0, 3*time.Millisecond)
		e.SetMeasurementAge(1, 3*time.Millisecond)
		g.SetInnovation(0, 0.1, 0.2)
		g.SetInnovation(1, -0.1, 0.3)
		g.SetNIS(1.2, 0.9, false)
		g.SetStates(x, sd)
	}
}

func TestStatusString(t *testing.T) {
	// The status names (status.go), used as label values.
	for s, want := range map[Status]string{
		StatusTracking: "tracking", StatusCoasting: "coasting",
		StatusStaleInput: "stale-input", StatusSuspect: "suspect", Status(9): "Status(9)",
	} {
		if got := s.String(); got != want {
			t.Errorf("Status(%d).String() = %q, want %q", s, got, want)
		}
	}
}

func ExampleMetrics_Estimator() {
	reg := prometheus.NewRegistry()
	m := NewMetrics(reg)
	e := m.Estimator("hot-water-loop",
		[]string{"t_tank", "t_hx"},                     // outputs
		[]string{"t_tank", "t_hx", "t_heater", "loss"}, // states
		[]string{"heater_power", "t_tank", "t_hx"},     // signals on the bus
		"kalman")
	defer e.Remove()
	// Each tick (no allocation, no label lookup):
	e.ObserveTick(StatusTracking, 80*time.Microsecond, 25*time.Microsecond, 0)
	e.Primary().SetInnovation(0, 0.12, 0.3)
}

// A fresh estimator reports its start-up load as the latest successful one,
// so that the refused-reload alert does not fire on every start
// (deploy/prometheus/rules_test.yml has the matching rule test).
func TestFreshEstimatorLastReloadSucceeded(t *testing.T) {
	_, m, _ := newTestMetrics(t)
	if v := testutil.ToFloat64(m.lastReload.WithLabelValues("loop")); v != 1 {
		t.Errorf("surmise_gain_last_reload_success of a fresh estimator = %v, want 1", v)
	}
	if v := testutil.ToFloat64(m.reloads.WithLabelValues("loop", "refused")); v != 0 {
		t.Errorf("refused reloads of a fresh estimator = %v, want 0", v)
	}
}

// TestMetricsSetOnlyChanges checks that the gauges written only on a change
// (sensor indicators, NIS band) still follow every change, NaN included.
func TestMetricsSetOnlyChanges(t *testing.T) {
	_, m, e := newTestMetrics(t)
	g := e.Primary()
	steps := []struct {
		st     estimator.SensorState
		lo, hi float64
	}{
		{estimator.SensorState{CUSUMHigh: 2, Dropout: 0.1}, 0.5, 1.5},
		{estimator.SensorState{CUSUMHigh: 2, Dropout: 0.1}, 0.5, 1.5}, // unchanged
		{estimator.SensorState{CUSUMLow: 12, Bias: -1, Stuck: true, LockedOut: true, Dropout: 0.1}, 0.6, 1.4},
		{estimator.SensorState{Dropout: math.NaN()}, math.NaN(), 1.4},
		{estimator.SensorState{}, 0.6, 1.4},
	}
	same := func(a, b float64) bool { return a == b || math.IsNaN(a) && math.IsNaN(b) }
	for k, s := range steps {
		g.SetSensor(1, &s.st)
		g.SetNISBand(s.lo, s.hi)
		got := []float64{
			testutil.ToFloat64(m.sensorBias.WithLabelValues("loop", "kalman", "t_hx")),
			testutil.ToFloat64(m.sensorCUSUM.WithLabelValues("loop", "kalman", "t_hx")),
			testutil.ToFloat64(m.sensorStuck.WithLabelValues("loop", "kalman", "t_hx")),
			testutil.ToFloat64(m.lockedOut.WithLabelValues("loop", "kalman", "t_hx")),
			testutil.ToFloat64(m.dropout.WithLabelValues("loop", "kalman", "t_hx")),
			testutil.ToFloat64(m.nisLower.WithLabelValues("loop", "kalman")),
			testutil.ToFloat64(m.nisUpper.WithLabelValues("loop", "kalman")),
		}
		want := []float64{float64(s.st.Bias), max(s.st.CUSUMHigh, s.st.CUSUMLow), b2f(s.st.Stuck), b2f(s.st.LockedOut), s.st.Dropout, s.lo, s.hi}
		for i := range want {
			if !same(got[i], want[i]) {
				t.Errorf("step %d: gauge %d is %v, want %v", k, i, got[i], want[i])
			}
		}
	}
}
