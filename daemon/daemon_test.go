package daemon_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net"
	"net/http"
	"os"
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

// discardLogger logs nothing (measurements, where logging would be work).
func discardLogger() *slog.Logger { return slog.New(slog.DiscardHandler) }

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

// startDaemon runs a daemon with opts (Listen, Registry, Logger and Notify
// filled in when zero) until the test ends or stop is called.
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
	if opts.Notify == nil && os.Getenv("NOTIFY_SOCKET") == "" {
		// Not the sd_notify of the test's own service manager, if any;
		// tests that set NOTIFY_SOCKET get the real one.
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
		once.Do(func() {}) // Run has returned: nothing to stop
		t.Fatalf("Run returned before starting: %v", err)
	case <-time.After(20 * time.Second):
		t.Fatal("the daemon did not start in 20 s")
	}
	return r
}

// wireEstimate is the JSON of an estimate as the tests read it.
type wireEstimate struct {
	Estimator string    `json:"estimator"`
	Instance  string    `json:"instance"`
	Time      time.Time `json:"time"`
	Seq       uint64    `json:"seq"`
	Status    string    `json:"status"`
	States    map[string]struct {
		Value float64  `json:"value"`
		Std   *float64 `json:"std"`
	} `json:"states"`
	Outputs map[string]struct {
		Outlier bool `json:"outlier"`
	} `json:"outputs"`
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

// TestNewRefuses checks the options New refuses, each with the reason it
// gives, and that a refused daemon registered no metric.
func TestNewRefuses(t *testing.T) {
	good := demoPlant(t, 0)
	renamed := func(spec daemon.PlantSpec) daemon.PlantSpec {
		p := *spec.Plant
		p.Path = "copy.yaml"
		spec.Plant = &p
		return spec
	}
	otherModel := demoPlant(t, 500*time.Millisecond) // its own fingerprint
	mismatch := daemon.PlantSpec{Plant: good.Plant, Gains: otherModel.Gains}
	noActive := func() daemon.PlantSpec {
		g := *good.Gains
		g.Active = "nonesuch"
		return daemon.PlantSpec{Plant: good.Plant, Gains: &g}
	}()
	for _, tc := range []struct {
		name string
		opts daemon.Options
		want []string
	}{
		{"no plant", daemon.Options{}, []string{"no plant to run"}},
		{"no gains", daemon.Options{Plants: []daemon.PlantSpec{{Plant: good.Plant}}}, []string{"no gains file"}},
		{"same name twice", daemon.Options{Plants: []daemon.PlantSpec{good, renamed(good)}},
			[]string{"hotwater-loop (copy.yaml): another plant file has the same name"}},
		{"gains of another model", daemon.Options{Plants: []daemon.PlantSpec{mismatch}}, []string{"designed for model"}},
		{"active set missing", daemon.Options{Plants: []daemon.PlantSpec{noActive}}, []string{`active gain set "nonesuch"`}},
		{"bad listen address", daemon.Options{Plants: []daemon.PlantSpec{good}, Listen: "localhost"}, []string{"HTTP listen address"}},
		{"embedded port", daemon.Options{Plants: []daemon.PlantSpec{good}, EmbeddedPort: 70000}, []string{"port 70000"}},
		{"every problem at once", daemon.Options{Plants: []daemon.PlantSpec{mismatch, noActive}, Listen: "x"},
			[]string{"designed for model", "nonesuch", "HTTP listen address", "same name"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			reg := prometheus.NewPedanticRegistry()
			tc.opts.Registry = reg
			d, err := daemon.New(tc.opts)
			if err == nil {
				t.Fatalf("New returned a daemon (%v), want an error", d)
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q does not say %q", err, w)
				}
			}
			if mfs, _ := reg.Gather(); len(mfs) != 0 {
				t.Errorf("a refused daemon registered %d metric families", len(mfs))
			}
		})
	}

	// Two daemons on one registry: the second is refused, not a panic.
	reg := prometheus.NewPedanticRegistry()
	if _, err := daemon.New(daemon.Options{Plants: []daemon.PlantSpec{good}, Registry: reg}); err != nil {
		t.Fatal(err)
	}
	if _, err := daemon.New(daemon.Options{Plants: []daemon.PlantSpec{good}, Registry: reg}); err == nil {
		t.Error("a second daemon on the same registry was accepted")
	}
}

// TestRunOnceAndCleanUp checks that Run runs once, and that when it returns
// the embedded server and the HTTP server no longer listen and the temporary
// state directory is gone.
func TestRunOnceAndCleanUp(t *testing.T) {
	spec := demoPlant(t, 50*time.Millisecond)
	r := startDaemon(t, daemon.Options{Plants: []daemon.PlantSpec{spec}, EmbeddedPort: -1})
	if r.ep.StateDir == "" {
		t.Fatal("no state directory for the embedded server")
	}
	if _, err := os.Stat(filepath.Join(r.ep.StateDir, "nats")); err != nil {
		t.Errorf("the embedded server's store: %v", err)
	}
	if err := r.d.Run(context.Background()); err == nil || !strings.Contains(err.Error(), "twice") {
		t.Errorf("second Run: %v, want an error", err)
	}
	busAddr := strings.TrimPrefix(r.ep.BusURL, "nats://")
	httpAddr := r.ep.HTTPAddr.String()
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	if err := r.stop(); err != nil { // idempotent
		t.Fatal(err)
	}
	for _, addr := range []string{busAddr, httpAddr} {
		if c, err := net.DialTimeout("tcp", addr, time.Second); err == nil {
			c.Close()
			t.Errorf("%s still accepts connections after Run returned", addr)
		}
	}
	if v, _ := gathered(t, r.reg, "surmise_ready", map[string]string{"estimator": spec.Plant.Name}); v != 0 {
		t.Errorf("surmise_ready = %v after Run returned, want 0", v)
	}
	if _, err := os.Stat(r.ep.StateDir); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("temporary state directory %s after Run returned: %v, want it removed", r.ep.StateDir, err)
	}
}

// TestNotify runs the daemon under a fake service manager (a datagram socket
// in NOTIFY_SOCKET, as systemd sets it): READY=1 once started, WATCHDOG=1
// while it ticks, STOPPING=1 when it stops, and nothing after.
func TestNotify(t *testing.T) {
	path := filepath.Join(t.TempDir(), "notify")
	conn, err := net.ListenUnixgram("unixgram", &net.UnixAddr{Name: path, Net: "unixgram"})
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	t.Setenv("NOTIFY_SOCKET", path)
	states := make(chan string, 1000)
	go func() {
		buf := make([]byte, 512)
		for {
			n, err := conn.Read(buf)
			if err != nil {
				close(states)
				return
			}
			states <- string(buf[:n])
		}
	}()

	r := startDaemon(t, daemon.Options{Plants: []daemon.PlantSpec{demoPlant(t, 20*time.Millisecond)},
		EmbeddedPort: -1, WatchdogInterval: 20 * time.Millisecond})
	next := func() string {
		select {
		case s := <-states:
			return s
		case <-time.After(10 * time.Second):
			t.Fatal("no notification in 10 s")
			return ""
		}
	}
	if s := next(); s != "READY=1" {
		t.Fatalf("first notification %q, want READY=1", s)
	}
	for i := 0; i < 3; i++ {
		if s := next(); s != "WATCHDOG=1" {
			t.Fatalf("notification %q while running, want WATCHDOG=1", s)
		}
	}
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	var last string
	for len(states) > 0 {
		last = <-states
	}
	if last != "STOPPING=1" {
		t.Errorf("last notification %q, want STOPPING=1", last)
	}
}

// TestBadSamples sends payloads that must be refused: each is counted by
// its reason, the log says so at once for the first, summarises the others
// in one line when the interval is over, and the daemon goes on.
func TestBadSamples(t *testing.T) {
	spec := demoPlant(t, 20*time.Millisecond)
	var log syncLog
	r := startDaemon(t, daemon.Options{Plants: []daemon.PlantSpec{spec}, EmbeddedPort: -1,
		Logger: slog.New(slog.NewTextHandler(&log, nil)), RefusedLogInterval: 2 * time.Second})
	nc, err := nats.Connect(r.ep.BusURL)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	tank := spec.Plant.Outputs[0] // range [0, 99] in the plant file
	for _, p := range []string{"garbage", "{\"value\": \"61\"}", "0x3d", "NaN", "1e999", "120", "-1", "61.5"} {
		if err := nc.Publish(tank.Subject, []byte(p)); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	labels := func(reason string) map[string]string {
		return map[string]string{"estimator": spec.Plant.Name, "signal": tank.Signal, "reason": reason}
	}
	// Refusals by reason: DecodeSample's (parse, nan) and the engine's
	// (range; nan for a number beyond a float64).
	want := map[string]float64{"parse": 3, "nan": 2, "range": 2}
	checkFor(t, 10*time.Second, 10*time.Millisecond, func() error {
		for reason, n := range want {
			if v, _ := gathered(t, r.reg, "surmise_samples_rejected_total", labels(reason)); v != n {
				return fmt.Errorf("%s refusals: %v, want %v", reason, v, n)
			}
		}
		if v, _ := gathered(t, r.reg, "surmise_samples_received_total",
			map[string]string{"estimator": spec.Plant.Name, "signal": tank.Signal}); v != 8 {
			return fmt.Errorf("received %v, want 8", v)
		}
		return nil
	})
	if n := strings.Count(log.String(), `msg="sample refused"`); n != 1 {
		t.Errorf("%d log lines about refused samples, want 1 (rate limited):\n%s", n, log.String())
	}
	// The six refused after the first are reported when the interval is
	// over, though no further sample is refused.
	checkFor(t, 10*time.Second, 20*time.Millisecond, func() error {
		if !strings.Contains(log.String(), `msg="samples refused"`) {
			return errors.New("no summary of the held-back refusals in the log")
		}
		return nil
	})
	if l := log.String(); !strings.Contains(l, "count=6") || !strings.Contains(l, "latest_reason=range") {
		t.Errorf("the summary does not say 6 refusals, the latest for range:\n%s", l)
	}
	if code, body := httpGet(t, "http://"+r.ep.HTTPAddr.String()+"/healthz"); code != 200 {
		t.Errorf("/healthz after bad samples: %d %s", code, body)
	}
}

// syncLog is a log destination safe for concurrent writes.
type syncLog struct {
	mu sync.Mutex
	b  strings.Builder
}

func (l *syncLog) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *syncLog) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// TestNotReadyWithoutSamples: a daemon whose estimators have never had a
// sample ticks (every tick stale-input) but is not ready, and says why;
// the first accepted sample makes it ready.
func TestNotReadyWithoutSamples(t *testing.T) {
	spec := demoPlant(t, 20*time.Millisecond)
	r := startDaemon(t, daemon.Options{Plants: []daemon.PlantSpec{spec}, EmbeddedPort: -1})
	readyz := "http://" + r.ep.HTTPAddr.String() + "/readyz"
	labels := map[string]string{"estimator": spec.Plant.Name}
	checkFor(t, 10*time.Second, 10*time.Millisecond, func() error {
		if v, _ := gathered(t, r.reg, "surmise_ticks_total", map[string]string{"estimator": spec.Plant.Name, "status": "stale-input"}); v < 3 {
			return fmt.Errorf("%v stale-input ticks, want 3", v)
		}
		return nil
	})
	if code, body := httpGet(t, readyz); code != 503 || !strings.Contains(body, "no sample received yet") {
		t.Errorf("/readyz with no sample ever: %d %q, want 503 saying no sample was received", code, body)
	}
	if v, _ := gathered(t, r.reg, "surmise_ready", labels); v != 0 {
		t.Errorf("surmise_ready = %v with no sample ever, want 0", v)
	}
	nc, err := nats.Connect(r.ep.BusURL)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	if err := nc.Publish(spec.Plant.Outputs[0].Subject, []byte("61.5")); err != nil {
		t.Fatal(err)
	}
	checkFor(t, 10*time.Second, 10*time.Millisecond, func() error {
		if code, body := httpGet(t, readyz); code != 200 {
			return fmt.Errorf("/readyz after a sample: %d %q", code, body)
		}
		if v, _ := gathered(t, r.reg, "surmise_ready", labels); v != 1 {
			return fmt.Errorf("surmise_ready = %v after a sample", v)
		}
		return nil
	})
}

// publishSample publishes one in-range sample of the plant's first output
// (the demo plant's tank outlet temperature) on nc.
func publishSample(t *testing.T, nc *nats.Conn, spec daemon.PlantSpec) {
	t.Helper()
	if err := nc.Publish(spec.Plant.Outputs[0].Subject, []byte("61.5")); err != nil && !errors.Is(err, nats.ErrConnectionReconnecting) {
		t.Fatal(err)
	}
}
