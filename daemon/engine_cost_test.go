package daemon

import (
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
)

// TestEngineTickAllocs asserts that a warmed-up tick, with its offers, a
// candidate lane, metrics attached and the JSON encoding, allocates nothing;
// one output is offered only every third tick, so the pattern, and the
// window's summed dof, keep changing.
func TestEngineTickAllocs(t *testing.T) {
	pl, gf := engDemoPlant(t)
	met := BindMetrics(NewMetrics(prometheus.NewPedanticRegistry()), pl, "kalman-tv")
	e := NewEngine(pl, engPrepare(t, pl, gf, "kalman-tv"),
		EngineOptions{Candidate: engPrepare(t, pl, gf, "kalman-current"), Metrics: met})
	est, cand := e.NewEstimate(), e.NewEstimate()
	buf := make([]byte, 0, 4096)
	k := 0
	tick := func() {
		tk := engAt(float64(k))
		e.Offer(0, 6, tk, tk)
		e.Offer(1, 61+0.01*float64(k%5), tk, tk)
		if k%3 == 0 {
			e.Offer(2, 54.4, tk, tk)
		}
		e.Tick(tk, est)
		met.ObserveTick(est.Status, time.Millisecond, 20*time.Microsecond, 0)
		e.CandidateTo(cand)
		buf = est.AppendJSON(buf[:0])
		k++
	}
	for range 200 { // fill the windows
		tick()
	}
	if n := testing.AllocsPerRun(500, tick); n != 0 {
		t.Errorf("%v allocations per tick, want 0", n)
	}
}

// BenchmarkEngineTick measures one tick of the demo plant with the
// time-varying Kalman filter: one input and two outputs offered
// (engDemoOffer), then the tick.
func BenchmarkEngineTick(b *testing.B) {
	pl, gf := engDemoPlant(b)
	e := NewEngine(pl, engPrepare(b, pl, gf, "kalman-tv"), EngineOptions{})
	est := e.NewEstimate()
	b.ReportAllocs()
	k := 0
	for b.Loop() {
		e.Tick(engDemoOffer(e, k), est)
		k++
	}
}

// engDemoOffer offers the demo plant's input and both outputs for tick k,
// the outputs changing from tick to tick as on a plant, and returns the
// tick's time.
func engDemoOffer(e *Engine, k int) time.Time {
	tk := engAt(float64(k))
	e.Offer(0, 6, tk, tk)
	e.Offer(1, 61+0.01*float64(k%7), tk, tk)
	e.Offer(2, 54.4+0.001*float64(k%5), tk, tk)
	return tk
}

// engMetricValue returns the value of the series name{labels} gathered from
// reg, and whether it exists.
func engMetricValue(t testing.TB, reg prometheus.Gatherer, name string, labels map[string]string) (float64, bool) {
	t.Helper()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
	next:
		for _, m := range mf.GetMetric() {
			got := map[string]string{}
			for _, lp := range m.GetLabel() {
				got[lp.GetName()] = lp.GetValue()
			}
			for k, v := range labels {
				if got[k] != v {
					continue next
				}
			}
			switch {
			case m.Counter != nil:
				return m.Counter.GetValue(), true
			case m.Gauge != nil:
				return m.Gauge.GetValue(), true
			}
		}
	}
	return 0, false
}

// TestEngineMetrics checks the series a tick sets against the estimate it
// wrote, and that swapping gain sets moves the per-set series to the new
// name and removes the old ones (DEVELOPERS.md, "Metric names").
func TestEngineMetrics(t *testing.T) {
	pl, gf := engDemoPlant(t)
	reg := prometheus.NewPedanticRegistry()
	met := BindMetrics(NewMetrics(reg), pl, "kalman-current")
	e := NewEngine(pl, engPrepare(t, pl, gf, "kalman-current"),
		EngineOptions{Metrics: met, Candidate: engPrepare(t, pl, gf, "kalman-prediction")})
	run := newEngDemoRun(t, e, pl, 3)
	name := pl.Name
	var est *Estimate
	for k := 0; k < 5; k++ {
		est = run.tick(k)
	}
	for _, s := range est.States {
		v, ok := engMetricValue(t, reg, "surmise_state", map[string]string{"estimator": name, "gains": "kalman-current", "state": s.Name})
		if !ok || v != s.Value {
			t.Errorf("surmise_state{state=%q} = %v (present %v), want %v", s.Name, v, ok, s.Value)
		}
		v, ok = engMetricValue(t, reg, "surmise_state_stddev", map[string]string{"estimator": name, "gains": "kalman-current", "state": s.Name})
		if !ok || v != s.Std {
			t.Errorf("surmise_state_stddev{state=%q} = %v (present %v), want %v", s.Name, v, ok, s.Std)
		}
	}
	for _, o := range est.Outputs {
		v, _ := engMetricValue(t, reg, "surmise_innovation", map[string]string{"estimator": name, "gains": "kalman-current", "output": o.Name})
		if v != o.Innovation {
			t.Errorf("surmise_innovation{output=%q} = %v, want %v", o.Name, v, o.Innovation)
		}
		v, _ = engMetricValue(t, reg, "surmise_measurement_age_seconds", map[string]string{"estimator": name, "output": o.Name})
		if v != o.Age {
			t.Errorf("surmise_measurement_age_seconds{output=%q} = %v, want %v", o.Name, v, o.Age)
		}
	}
	if v, _ := engMetricValue(t, reg, "surmise_nis", map[string]string{"estimator": name, "gains": "kalman-current"}); v != est.NIS {
		t.Errorf("surmise_nis = %v, want %v", v, est.NIS)
	}
	if v, _ := engMetricValue(t, reg, "surmise_nis_window_mean", map[string]string{"estimator": name, "gains": "kalman-current"}); v != est.NISMean {
		t.Errorf("surmise_nis_window_mean = %v, want %v", v, est.NISMean)
	}
	info := func(gains, form string) bool {
		_, ok := engMetricValue(t, reg, "surmise_gains_info", map[string]string{"estimator": name, "gains": gains, "form": form, "fingerprint": gf.Fingerprint})
		return ok
	}
	if !info("kalman-current", "current") || !info("kalman-prediction", "prediction") {
		t.Errorf("surmise_gains_info lacks the active or the candidate set")
	}

	// Promote by hand: the candidate's set becomes active, the shadow lane
	// runs the time-varying set; kalman-current is no longer run.
	e.UseGains(engPrepare(t, pl, gf, "kalman-prediction"))
	e.SetCandidate(engPrepare(t, pl, gf, "kalman-tv"))
	est = run.tick(5)
	if info("kalman-current", "current") {
		t.Errorf("surmise_gains_info still has kalman-current after it stopped running")
	}
	if _, ok := engMetricValue(t, reg, "surmise_state", map[string]string{"gains": "kalman-current"}); ok {
		t.Errorf("surmise_state series of kalman-current left behind")
	}
	if !info("kalman-prediction", "prediction") || !info("kalman-tv", "kalman") {
		t.Errorf("surmise_gains_info lacks kalman-prediction or kalman-tv")
	}
	v, _ := engMetricValue(t, reg, "surmise_state", map[string]string{"estimator": name, "gains": "kalman-prediction", "state": est.States[0].Name})
	if v != est.States[0].Value {
		t.Errorf("surmise_state of the new active set = %v, want %v", v, est.States[0].Value)
	}
}
