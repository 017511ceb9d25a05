package daemon_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
	dto "github.com/prometheus/client_model/go"

	"surmise/config"
	"surmise/daemon"
	"surmise/estimator"
)

// checkFor calls f every `every` until it returns nil or total has passed,
// and then fails the test with f's last error (the polling helper of
// nats-server's tests).
func checkFor(t testing.TB, total, every time.Duration, f func() error) {
	t.Helper()
	deadline := time.Now().Add(total)
	var err error
	for time.Now().Before(deadline) {
		if err = f(); err == nil {
			return
		}
		time.Sleep(every)
	}
	if err = f(); err != nil {
		t.Fatalf("after %v: %v", total, err)
	}
}

// demoPlant loads the demo plant and its gains, with the sample time (and
// the signals' max_age, in proportion) changed to ts so that a test runs
// many ticks in little time. The discrete model is unchanged: only the wall
// time of a tick is. The gains file was checked against the file's model
// before the change.
func demoPlant(t testing.TB, ts time.Duration) daemon.PlantSpec {
	t.Helper()
	path := filepath.Join("..", "testdata", "plants", "hotwater-loop.yaml")
	plant, err := config.LoadPlant(path)
	if err != nil {
		t.Fatal(err)
	}
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		t.Fatal(err)
	}
	if ts > 0 {
		scale := ts.Seconds() / plant.Model.Ts
		cp := *plant
		md := *plant.Model
		md.Ts = ts.Seconds()
		cp.Model = &md
		cp.Inputs = scaleWires(plant.Inputs, scale)
		cp.Outputs = scaleWires(plant.Outputs, scale)
		plant = &cp
		fp := config.Fingerprint(plant.Model)
		g := *gains
		g.Fingerprint = fp
		gains = &g
	}
	return daemon.PlantSpec{Plant: plant, Gains: gains}
}

func scaleWires(ws []config.Wire, scale float64) []config.Wire {
	out := append([]config.Wire(nil), ws...)
	for i := range out {
		out[i].MaxAge = time.Duration(float64(out[i].MaxAge) * scale)
	}
	return out
}

// longMaxAge returns ws with a max_age of a minute.
func longMaxAge(ws []config.Wire) []config.Wire {
	out := append([]config.Wire(nil), ws...)
	for i := range out {
		out[i].MaxAge = time.Minute
	}
	return out
}

// testLogger logs to the test's output.
func testLogger(t testing.TB) *slog.Logger {
	return slog.New(slog.NewTextHandler(t.Output(), &slog.HandlerOptions{Level: slog.LevelDebug}))
}

// running is a daemon started by startDaemon.
type running struct {
	d    *daemon.Daemon
	ep   daemon.Endpoints
	reg  *prometheus.Registry
	stop func() error // cancels Run and returns its error; idempotent
}

// startDaemon runs a daemon with opts (Listen, Registry, Logger and
// StateDir filled in when zero) until the test ends or stop is called.
func startDaemon(t testing.TB, opts daemon.Options) *running {
	t.Helper()
	if opts.Listen == "" {
		opts.Listen = "127.0.0.1:0"
	}
	if opts.Registry == nil {
		opts.Registry = prometheus.NewPedanticRegistry()
	}
	if opts.Logger == nil {
		opts.Logger = testLogger(t)
	}
	if opts.StateDir == "" && opts.Bus.URL == "" {
		opts.StateDir = t.TempDir()
	}
	if opts.Notify == nil {
		opts.Notify = func(string) error { return nil }
	}
	started := make(chan daemon.Endpoints, 1)
	opts.Started = func(ep daemon.Endpoints) { started <- ep }
	d, err := daemon.New(opts)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- d.Run(ctx) }()
	var once sync.Once
	var runErr error
	r := &running{d: d, reg: opts.Registry}
	r.stop = func() error {
		once.Do(func() {
			cancel()
			runErr = <-done
		})
		return runErr
	}
	t.Cleanup(func() {
		if err := r.stop(); err != nil {
			t.Errorf("Run: %v", err)
		}
	})
	select {
	case r.ep = <-started:
	case err := <-done:
		t.Fatalf("Run returned before starting: %v", err)
	case <-time.After(20 * time.Second):
		t.Fatal("the daemon did not start in 20 s")
	}
	return r
}

// wireEstimate is the JSON of an estimate as the tests read it.
type wireEstimate struct {
	Time   time.Time `json:"time"`
	Seq    uint64    `json:"seq"`
	Status string    `json:"status"`
	States map[string]struct {
		Value float64  `json:"value"`
		Std   *float64 `json:"std"`
	} `json:"states"`
}

func parseEstimate(t testing.TB, data []byte) wireEstimate {
	t.Helper()
	var w wireEstimate
	if err := json.Unmarshal(data, &w); err != nil {
		t.Fatalf("estimate %s: %v", data, err)
	}
	return w
}

// samplePayload is the JSON form of a sample with its time.
func samplePayload(v float64, at time.Time) []byte {
	return fmt.Appendf(nil, `{"value": %s, "time": %q}`, fmt.Sprint(v), at.UTC().Format(time.RFC3339Nano))
}

// gathered returns the value of one series (counter, gauge, or a
// histogram's sample count) from g, and whether it exists.
func gathered(t testing.TB, g prometheus.Gatherer, name string, labels map[string]string) (float64, bool) {
	t.Helper()
	mfs, err := g.Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
	next:
		for _, m := range mf.GetMetric() {
			have := map[string]string{}
			for _, lp := range m.GetLabel() {
				have[lp.GetName()] = lp.GetValue()
			}
			for k, v := range labels {
				if have[k] != v {
					continue next
				}
			}
			return metricValue(m), true
		}
	}
	return 0, false
}

func metricValue(m *dto.Metric) float64 {
	switch {
	case m.Counter != nil:
		return m.Counter.GetValue()
	case m.Gauge != nil:
		return m.Gauge.GetValue()
	case m.Histogram != nil:
		return float64(m.Histogram.GetSampleCount())
	}
	return math.NaN()
}

// histogram returns the named histogram's count and sum.
func histogram(t testing.TB, g prometheus.Gatherer, name string, labels map[string]string) (count uint64, sum float64) {
	t.Helper()
	mfs, err := g.Gather()
	if err != nil {
		t.Fatal(err)
	}
	for _, mf := range mfs {
		if mf.GetName() != name {
			continue
		}
	next:
		for _, m := range mf.GetMetric() {
			for _, lp := range m.GetLabel() {
				if v, ok := labels[lp.GetName()]; ok && v != lp.GetValue() {
					continue next
				}
			}
			return m.GetHistogram().GetSampleCount(), m.GetHistogram().GetSampleSum()
		}
	}
	t.Fatalf("no histogram %s%v", name, labels)
	return 0, 0
}

// httpGet returns the status and body of GET url.
func httpGet(t testing.TB, url string) (int, string) {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return resp.StatusCode, string(b)
}

var _ = errors.New
var _ = strings.Contains
var _ = estimator.NewPlant
var _ = testutil.GatherAndLint
var _ = nats.Connect
