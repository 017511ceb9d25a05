package daemon

import (
	"path/filepath"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"surmise/config"
	"surmise/estimator"
)

// TestSensorMetrics runs the engine on the demo plant simulated with its
// own noise and puts a +0.25 K offset (five times the sensor's noise) on
// hx_outlet from tick 300: surmise_sensor_bias of hx_outlet must go from 0
// to +1 with one alarm counted, while tank_outlet stays quiet; nothing is
// stuck, locked out or dropped.
func TestSensorMetrics(t *testing.T) {
	plant, err := config.LoadPlant(filepath.Join("..", "testdata", "plants", "hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	gs, err := estimator.DesignKalman(plant.Model, estimator.Current, true)
	if err != nil {
		t.Fatal(err)
	}
	gs.Name = "kf"
	prep, err := estimator.Prepare(plant.Model, gs, plant.Gate)
	if err != nil {
		t.Fatal(err)
	}
	reg := prometheus.NewPedanticRegistry()
	e := NewEngine(plant, prep, EngineOptions{Metrics: BindMetrics(NewMetrics(reg), plant, "kf")})
	sim := estimator.NewPlant(plant.Model, 17, nil)
	est := e.NewEstimate()
	t0 := time.Date(2026, 2, 1, 0, 0, 0, 0, time.UTC)
	u, y := []float64{6}, make([]float64, 2)
	metric := func(name, output string) float64 {
		v, _ := engMetricValue(t, reg, name, map[string]string{"estimator": plant.Name, "gains": "kf", "output": output})
		return v
	}
	for k := 0; k < 340; k++ {
		at := t0.Add(time.Duration(k) * time.Second)
		sim.Step(u)
		sim.OutputTo(y)
		if k >= 300 {
			y[1] += 0.25
		}
		e.Offer(0, u[0], at, at)
		e.Offer(1, y[0], at, at)
		e.Offer(2, y[1], at, at)
		e.Tick(at, est)
		if k == 299 {
			for _, o := range []string{"tank_outlet", "hx_outlet"} {
				if b, a := metric("surmise_sensor_bias", o), metric("surmise_sensor_bias_alarms_total", o); b != 0 || a != 0 {
					t.Fatalf("%s before the offset: bias %v, %v alarms", o, b, a)
				}
			}
		}
	}
	if b, a := metric("surmise_sensor_bias", "hx_outlet"), metric("surmise_sensor_bias_alarms_total", "hx_outlet"); b != 1 || a != 1 {
		t.Errorf("hx_outlet with a +0.25 K offset: bias %v, %v alarms; want 1, 1", b, a)
	}
	if c := metric("surmise_sensor_cusum", "hx_outlet"); !(c > estimator.DefaultCUSUMH) {
		t.Errorf("hx_outlet CUSUM %v, want above %v", c, estimator.DefaultCUSUMH)
	}
	if !(est.Outputs[1].Bias == 1 && est.Outputs[0].Bias == 0) {
		t.Errorf("estimate: bias %d, %d; want 0, 1", est.Outputs[0].Bias, est.Outputs[1].Bias)
	}
	for _, o := range []string{"tank_outlet", "hx_outlet"} {
		if s, l, d := metric("surmise_sensor_stuck", o), metric("surmise_sensor_locked_out", o), metric("surmise_sensor_dropout_ratio", o); s != 0 || l != 0 || d != 0 {
			t.Errorf("%s: stuck %v, locked out %v, drop-out %v; want 0", o, s, l, d)
		}
	}
}
