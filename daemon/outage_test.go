package daemon_test

import (
	"errors"
	"fmt"
	"net"
	"os"
	"os/exec"
	"strconv"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
	"surmise/estimator"
)

// natsServerBinary returns the nats-server on PATH. Without one the test is
// skipped, except in CI (CI=true), whose script installs it.
func natsServerBinary(t *testing.T) string {
	t.Helper()
	path, err := exec.LookPath("nats-server")
	if err != nil {
		msg := "nats-server is not on PATH (go install github.com/nats-io/nats-server/v2@v2.15.2)"
		if os.Getenv("CI") == "true" {
			t.Fatal(msg)
		}
		t.Skip(msg)
	}
	return path
}

// freePort returns a TCP port on 127.0.0.1 that was free a moment ago.
func freePort(t *testing.T) int {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().(*net.TCPAddr).Port
}

// externalServer is a nats-server process.
type externalServer struct {
	cmd  *exec.Cmd
	done chan struct{}
}

// startExternal starts nats-server on 127.0.0.1:port, with the further
// arguments args, and waits until it accepts clients. The test's cleanup
// kills it if it still runs.
func startExternal(t *testing.T, bin string, port int, args ...string) *externalServer {
	t.Helper()
	cmd := exec.Command(bin, append([]string{"-a", "127.0.0.1", "-p", strconv.Itoa(port)}, args...)...)
	cmd.Stdout, cmd.Stderr = t.Output(), t.Output()
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	s := &externalServer{cmd: cmd, done: make(chan struct{})}
	go func() { cmd.Wait(); close(s.done) }()
	t.Cleanup(s.kill)
	url := fmt.Sprintf("nats://127.0.0.1:%d", port)
	checkFor(t, 10*time.Second, 20*time.Millisecond, func() error {
		select {
		case <-s.done:
			return errors.New("nats-server exited")
		default:
		}
		nc, err := nats.Connect(url, nats.Timeout(time.Second))
		if err != nil {
			return err
		}
		nc.Close()
		return nil
	})
	return s
}

// kill kills the server (SIGKILL: no goodbye to its clients) and waits for
// the process to end.
func (s *externalServer) kill() {
	s.cmd.Process.Kill()
	<-s.done
}

// seen is an estimate as the test saw it: on the bus, or from the daemon's
// in-process hook.
type seen struct {
	recv   time.Time
	tick   time.Time
	seq    uint64
	status string
}

// journal collects what the test sees, from several goroutines.
type journal struct {
	mu   sync.Mutex
	list []seen
}

func (j *journal) add(s seen) {
	j.mu.Lock()
	j.list = append(j.list, s)
	j.mu.Unlock()
}

func (j *journal) since(t time.Time) []seen {
	j.mu.Lock()
	defer j.mu.Unlock()
	var out []seen
	for _, s := range j.list {
		if !s.recv.Before(t) {
			out = append(out, s)
		}
	}
	return out
}

// TestOutageExternalServer runs the daemon against a separate nats-server,
// kills the server mid-run and restarts it on the same port: the daemon
// keeps ticking while disconnected (coasting, surmise_bus_connected 0),
// reconnects (the disconnect counted), tracks again, and publishes nothing
// computed during the outage after it.
func TestOutageExternalServer(t *testing.T) {
	bin := natsServerBinary(t)
	port := freePort(t)
	url := fmt.Sprintf("nats://127.0.0.1:%d", port)
	srv := startExternal(t, bin, port)

	const ts = 50 * time.Millisecond
	spec := demoPlant(t, ts)
	// Long max_age: an outage leaves the inputs held, so the status is
	// coasting rather than stale-input.
	spec.Plant.Inputs = longMaxAge(spec.Plant.Inputs)
	spec.Plant.Outputs = longMaxAge(spec.Plant.Outputs)

	r := startDaemon(t, daemon.Options{
		Plants: []daemon.PlantSpec{spec},
		Bus:    daemon.BusOptions{URL: url, ReconnectWait: 50 * time.Millisecond, ReconnectJitter: time.Millisecond},
	})

	// What the daemon computes, tick by tick, whether or not it publishes.
	var computed journal
	remove := r.d.OnEstimate(func(e *daemon.Estimator, est *daemon.Estimate, _ []byte) {
		computed.add(seen{recv: time.Now(), tick: est.Time, seq: est.Seq, status: est.Status.String()})
	})
	defer remove()

	// The test's client: it reconnects too, and never replays.
	nc, err := nats.Connect(url, nats.MaxReconnects(-1), nats.ReconnectWait(20*time.Millisecond),
		nats.ReconnectBufSize(-1))
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	var published journal
	if _, err := nc.Subscribe(daemon.EstimateSubject(spec.Plant), func(m *nats.Msg) {
		est := parseEstimate(t, m.Data)
		published.add(seen{recv: time.Now(), tick: est.Time, seq: est.Seq, status: est.Status})
	}); err != nil {
		t.Fatal(err)
	}

	// A free-running plant publishes samples every period.
	stopFeed := make(chan struct{})
	fed := make(chan struct{})
	go func() {
		defer close(fed)
		feed(nc, spec, ts, stopFeed)
	}()
	defer func() { close(stopFeed); <-fed }()

	status := func(name string) float64 {
		v, _ := gathered(t, r.reg, "surmise_status", map[string]string{"estimator": spec.Plant.Name, "status": name})
		return v
	}
	connected := func() float64 {
		v, _ := gathered(t, r.reg, "surmise_bus_connected", nil)
		return v
	}
	checkFor(t, 10*time.Second, 10*time.Millisecond, func() error {
		if status("tracking") != 1 || len(published.since(time.Time{})) < 5 {
			return errors.New("not tracking on the bus yet")
		}
		return nil
	})

	// The outage.
	killed := time.Now()
	srv.kill()
	checkFor(t, 10*time.Second, 10*time.Millisecond, func() error {
		if connected() != 0 {
			return errors.New("surmise_bus_connected still 1")
		}
		if n := countStatus(computed.since(killed), "coasting"); n < 5 {
			return fmt.Errorf("%d coasting ticks since the kill, want 5", n)
		}
		return nil
	})
	if status("coasting") != 1 {
		t.Errorf("surmise_status{status=coasting} = %v during the outage, want 1", status("coasting"))
	}
	if code, body := httpGet(t, "http://"+r.ep.HTTPAddr.String()+"/healthz"); code != 200 {
		t.Errorf("/healthz during the outage: %d %s (a bus outage must not fail it)", code, body)
	}
	if code, _ := httpGet(t, "http://"+r.ep.HTTPAddr.String()+"/readyz"); code != 503 {
		t.Errorf("/readyz during the outage: %d, want 503", code)
	}

	// The server comes back on the same port.
	restarted := time.Now()
	startExternal(t, bin, port)
	checkFor(t, 20*time.Second, 10*time.Millisecond, func() error {
		if connected() != 1 {
			return errors.New("not reconnected")
		}
		after := published.since(restarted)
		if countStatus(after, "tracking") < 5 {
			return fmt.Errorf("%d tracking estimates on the bus since the restart, want 5", countStatus(after, "tracking"))
		}
		return nil
	})
	if v, _ := gathered(t, r.reg, "surmise_bus_disconnects_total", nil); v != 1 {
		t.Errorf("surmise_bus_disconnects_total = %v, want 1", v)
	}

	// Nothing computed during the outage reaches the bus afterwards: every
	// estimate received after the kill is dated after the restart, and
	// reached us within a few periods of its tick.
	for _, s := range published.since(killed) {
		if s.tick.Before(restarted) {
			t.Errorf("estimate %d of %v (during the outage, %v to %v) received at %v",
				s.seq, s.tick.Format(time.StampMicro), killed.Format(time.StampMicro), restarted.Format(time.StampMicro), s.recv.Format(time.StampMicro))
		}
		if late := s.recv.Sub(s.tick); late > 10*ts {
			t.Errorf("estimate %d received %v after its tick", s.seq, late)
		}
	}
	during := computed.since(killed)
	t.Logf("outage %v: %d ticks computed since the kill, %d coasting; %d estimates on the bus since the restart",
		restarted.Sub(killed).Round(time.Millisecond), len(during), countStatus(during, "coasting"), len(published.since(restarted)))
	if err := r.stop(); err != nil { // before the server's cleanup kills it
		t.Fatalf("Run: %v", err)
	}
}

func countStatus(list []seen, status string) int {
	n := 0
	for _, s := range list {
		if s.status == status {
			n++
		}
	}
	return n
}

// feed publishes a free-running simulation of spec's plant every period
// until stop is closed. Publish errors (while disconnected) are ignored.
func feed(nc *nats.Conn, spec daemon.PlantSpec, period time.Duration, stop <-chan struct{}) {
	md := spec.Plant.Model
	_, _, p := md.Dims()
	sim := estimator.NewPlant(md, 7, nil)
	u := append([]float64(nil), md.U0...)
	y := make([]float64, p)
	tick := time.NewTicker(period)
	defer tick.Stop()
	for {
		select {
		case <-stop:
			return
		case <-tick.C:
		}
		sim.Step(u)
		sim.OutputTo(y)
		now := time.Now()
		for i, w := range spec.Plant.Inputs {
			nc.Publish(w.Subject, samplePayload(u[i], now))
		}
		for i, w := range spec.Plant.Outputs {
			nc.Publish(w.Subject, samplePayload(y[i], now))
		}
	}
}
