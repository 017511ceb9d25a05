package daemon_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strings"
	"sync"
	"testing"
	"time"

	natsserver "github.com/nats-io/nats-server/v2/test"
	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"

	"surmise/daemon"
)

// jetStreamServer runs a NATS server with JetStream on a random loopback
// port for the test, and returns its URL.
func jetStreamServer(t *testing.T) string {
	t.Helper()
	opts := natsserver.DefaultTestOptions
	opts.Port = -1
	opts.JetStream = true
	opts.StoreDir = t.TempDir()
	ns := natsserver.RunServer(&opts)
	t.Cleanup(ns.Shutdown)
	return ns.ClientURL()
}

// readyz returns the status and body of a daemon's /readyz.
func readyz(t *testing.T, r *running) (int, string) {
	t.Helper()
	resp, err := http.Get("http://" + r.ep.HTTPAddr.String() + "/readyz")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// Three daemons for one estimator on one bus: the first runs it; the second
// is refused with the first's name; the third stands by — ticking, not
// publishing, not ready — and takes over when the first stops.
func TestOneWriterPerEstimator(t *testing.T) {
	const ts = 50 * time.Millisecond
	spec := demoPlant(t, ts)
	url := jetStreamServer(t)
	first := startDaemon(t, daemon.Options{Plants: []daemon.PlantSpec{spec}, Bus: daemon.BusOptions{URL: url}})

	// Who publishes: the instance behind each estimate cannot be seen on
	// the wire, so count sequence numbers: two writers repeat them.
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	// A plant feeds both daemons (readiness wants samples).
	stopFeed, fed := make(chan struct{}), make(chan struct{})
	go func() { defer close(fed); feed(nc, spec, ts, stopFeed) }()
	defer func() { close(stopFeed); <-fed }()
	var mu sync.Mutex
	seqs := map[uint64]int{}
	if _, err := nc.Subscribe(daemon.EstimateSubject(spec.Plant), func(m *nats.Msg) {
		var est struct{ Seq uint64 }
		json.Unmarshal(m.Data, &est)
		mu.Lock()
		seqs[est.Seq]++
		mu.Unlock()
	}); err != nil {
		t.Fatal(err)
	}

	// The second daemon is refused before it starts.
	d2, err := daemon.New(daemon.Options{Plants: []daemon.PlantSpec{spec}, Bus: daemon.BusOptions{URL: url},
		Listen: "127.0.0.1:0", Registry: prometheus.NewPedanticRegistry(), Logger: testLogger(t), Notify: func(string) error { return nil }})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	err = d2.Run(ctx)
	if err == nil {
		t.Fatal("a second daemon for the same estimator started")
	}
	for _, want := range []string{"estimator hotwater-loop runs in another daemon", "held by instance", "--standby"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("refusal %q lacks %q", err, want)
		}
	}

	// The third stands by.
	third := startDaemon(t, daemon.Options{Plants: []daemon.PlantSpec{spec}, Bus: daemon.BusOptions{URL: url},
		Standby: true})
	var thirdTicks sync.Map
	remove := third.d.OnEstimate(func(_ *daemon.Estimator, est *daemon.Estimate, _ []byte) { thirdTicks.Store(est.Seq, true) })
	defer remove()
	checkFor(t, 5*time.Second, 20*time.Millisecond, func() error {
		if _, ok := thirdTicks.Load(uint64(5)); !ok {
			return errors.New("the standby does not tick")
		}
		return nil
	})
	if code, body := readyz(t, third); code != http.StatusServiceUnavailable || !strings.Contains(body, "standby") {
		t.Errorf("standby's /readyz: %d %q, want 503 naming the standby", code, body)
	}
	// A control request reaches both daemons (no queue group); only the
	// holder answers it, so a promote or a reset cannot land in the
	// standby. Replies are collected for a second: a second one would come
	// within milliseconds of the first on loopback.
	inbox := nc.NewRespInbox()
	replies, err := nc.SubscribeSync(inbox)
	if err != nil {
		t.Fatal(err)
	}
	if err := nc.PublishRequest(daemon.ControlSubject(spec.Plant.Name, daemon.VerbStatus), inbox, nil); err != nil {
		t.Fatal(err)
	}
	answered := 0
	for deadline := time.Now().Add(time.Second); time.Now().Before(deadline); {
		if _, err := replies.NextMsg(time.Until(deadline)); err == nil {
			answered++
		}
	}
	replies.Unsubscribe()
	if answered != 1 {
		t.Errorf("a status request was answered %d times with a daemon standing by, want once (by the holder)", answered)
	}
	mu.Lock()
	for seq, n := range seqs {
		if n > 1 {
			t.Errorf("estimate %d published %d times while one daemon stood by", seq, n)
		}
	}
	mu.Unlock()

	// The first stops cleanly: its lease is released, and the standby
	// takes over at once (well within the lease's TTL).
	stopped := time.Now()
	if err := first.stop(); err != nil {
		t.Fatal(err)
	}
	checkFor(t, 3*time.Second, 20*time.Millisecond, func() error {
		// Samples keep arriving, as on a plant: a daemon is ready only once
		// its engine has had one.
		publishSample(t, nc, spec)
		if code, body := readyz(t, third); code != http.StatusOK {
			return fmt.Errorf("standby not ready after the holder stopped: %d %s", code, body)
		}
		return nil
	})
	t.Logf("standby ready %v after the holder's stop began", time.Since(stopped))
}
