package daemon_test

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"net/http"
	"os/exec"
	"strconv"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"

	"surmise/daemon"
)

// startJetStreamProcess starts a separate nats-server process with
// JetStream on 127.0.0.1:port, and waits until it accepts clients.
func startJetStreamProcess(t *testing.T, bin string, port int) *externalServer {
	t.Helper()
	cmd := exec.Command(bin, "-a", "127.0.0.1", "-p", strconv.Itoa(port), "-js", "-sd", t.TempDir())
	cmd.Stdout, cmd.Stderr = t.Output(), t.Output()
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	s := &externalServer{cmd: cmd, done: make(chan struct{})}
	go func() { cmd.Wait(); close(s.done) }()
	t.Cleanup(func() {
		cmd.Process.Signal(syscall.SIGCONT)
		s.kill()
	})
	checkFor(t, 10*time.Second, 20*time.Millisecond, func() error {
		nc, err := nats.Connect(fmt.Sprintf("nats://127.0.0.1:%d", port), nats.Timeout(time.Second))
		if err != nil {
			return err
		}
		nc.Close()
		return nil
	})
	return s
}

// A stalled server (SIGSTOP, a process that hangs with its sockets open) is
// seen within about three seconds: the bus is marked down, /readyz fails,
// and estimates are withheld, so that SIGCONT brings no burst of estimates
// computed during the stall. A stop requested while the server is stalled
// and a live-page stream is open exits cleanly within two seconds.
func TestStalledServer(t *testing.T) {
	bin := natsServerBinary(t)
	port := freePort(t)
	url := fmt.Sprintf("nats://127.0.0.1:%d", port)
	srv := startJetStreamProcess(t, bin, port)

	const ts = 100 * time.Millisecond
	spec := demoPlant(t, ts)
	spec.Plant.Inputs = longMaxAge(spec.Plant.Inputs)
	spec.Plant.Outputs = longMaxAge(spec.Plant.Outputs)
	reg := prometheus.NewPedanticRegistry()
	started := make(chan daemon.Endpoints, 1)
	d, err := daemon.New(daemon.Options{
		Plants: []daemon.PlantSpec{spec}, Bus: daemon.BusOptions{URL: url},
		Listen: "127.0.0.1:0", Registry: reg, Logger: testLogger(t), Notify: func(string) error { return nil },
		Started: func(ep daemon.Endpoints) { started <- ep },
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	done := make(chan error, 1)
	go func() { done <- d.Run(ctx) }()
	var ep daemon.Endpoints
	select {
	case ep = <-started:
	case err := <-done:
		t.Fatal(err)
	case <-time.After(20 * time.Second):
		t.Fatal("not started")
	}
	r := &running{d: d, ep: ep, reg: reg}

	// A subscriber on its own connection, noting each estimate's tick time
	// and arrival.
	nc, err := nats.Connect(url, nats.MaxReconnects(-1), nats.ReconnectWait(20*time.Millisecond))
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	var got journal
	if _, err := nc.Subscribe(daemon.EstimateSubject(spec.Plant), func(m *nats.Msg) {
		est := parseEstimate(t, m.Data)
		got.add(seen{recv: time.Now(), tick: est.Time, seq: est.Seq, status: est.Status})
	}); err != nil {
		t.Fatal(err)
	}
	stopFeed, fed := make(chan struct{}), make(chan struct{})
	go func() { defer close(fed); feed(nc, spec, ts, stopFeed) }()
	defer func() { close(stopFeed); <-fed }()
	checkFor(t, 10*time.Second, 20*time.Millisecond, func() error {
		if len(got.since(time.Time{})) < 5 {
			return errors.New("no estimates on the bus yet")
		}
		return nil
	})

	// A live-page stream stays open for the rest of the test.
	resp, err := http.Get("http://" + ep.HTTPAddr.String() + "/events?estimator=" + spec.Plant.Name)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	go func() {
		sc := bufio.NewScanner(resp.Body)
		for sc.Scan() {
		}
	}()

	connected := func() float64 {
		v, _ := gathered(t, reg, "surmise_bus_connected", nil)
		return v
	}
	stopped := time.Now()
	if err := srv.cmd.Process.Signal(syscall.SIGSTOP); err != nil {
		t.Fatal(err)
	}
	checkFor(t, 3*time.Second, 20*time.Millisecond, func() error {
		if connected() != 0 {
			return errors.New("surmise_bus_connected still 1")
		}
		if code, body := readyz(t, r); code != http.StatusServiceUnavailable {
			return fmt.Errorf("/readyz %d %s", code, body)
		}
		return nil
	})
	seenAfter := time.Since(stopped)
	t.Logf("stall seen after %v", seenAfter)
	// Stay stalled a while, then resume the server.
	time.Sleep(3 * time.Second) // the length of the outage, not a wait for a condition
	resumed := time.Now()
	if err := srv.cmd.Process.Signal(syscall.SIGCONT); err != nil {
		t.Fatal(err)
	}
	checkFor(t, 10*time.Second, 20*time.Millisecond, func() error {
		// Samples keep arriving, as on a plant: a daemon is ready only once
		// its engine has had one.
		publishSample(t, nc, spec)
		if code, body := readyz(t, r); code != http.StatusOK {
			return fmt.Errorf("/readyz %d %s after SIGCONT", code, body)
		}
		return nil
	})
	// Every estimate that arrived after the resume but was computed during
	// the stall was computed before the stall was seen: nothing computed
	// while the bus was marked down was sent.
	var late int
	for _, s := range got.since(resumed) {
		if s.tick.Before(resumed) {
			late++
			if s.tick.After(stopped.Add(seenAfter)) {
				t.Errorf("estimate %d of %v (%v after SIGSTOP) arrived after SIGCONT: computed while the stall was known", s.seq, s.tick, s.tick.Sub(stopped))
			}
		}
	}
	t.Logf("%d estimates computed before the stall was seen arrived after SIGCONT (period %v)", late, ts)

	// A stop while the server is stalled again, with the page stream open.
	if err := srv.cmd.Process.Signal(syscall.SIGSTOP); err != nil {
		t.Fatal(err)
	}
	var wg sync.WaitGroup
	defer wg.Wait()
	stopAt := time.Now()
	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("a requested stop returned %v", err)
		}
		if took := time.Since(stopAt); took > 2*time.Second {
			t.Errorf("stop took %v, want at most 2 s", took)
		} else {
			t.Logf("stopped in %v with the server stalled and a page stream open", took)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("the daemon did not stop")
	}
}
