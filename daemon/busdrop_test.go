package daemon

import (
	"fmt"
	"log/slog"
	"strings"
	"testing"
	"time"

	natsserver "github.com/nats-io/nats-server/v2/test"
	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
)

// A subscriber that cannot keep up: what its pending limits drop is
// counted (pending-limit), exactly as many as the client dropped, and the
// client's repeated slow-consumer errors make one log line, not one each.
func TestBusCountsDropsAndLimitsWarnings(t *testing.T) {
	opts := natsserver.DefaultTestOptions
	opts.Port = -1
	ns := natsserver.RunServer(&opts)
	defer ns.Shutdown()
	reg := prometheus.NewPedanticRegistry()
	m := NewMetrics(reg)
	var logged cmLog // reload_test.go
	b, err := Connect(BusOptions{URL: ns.ClientURL()}, m, slog.New(slog.NewTextHandler(&logged, nil)))
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close(time.Second)

	release := make(chan struct{})
	sub, err := b.Conn().Subscribe("pilot.flood", func(*nats.Msg) { <-release })
	if err != nil {
		t.Fatal(err)
	}
	if err := sub.SetPendingLimits(4, 1<<20); err != nil {
		t.Fatal(err)
	}
	pub, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer pub.Close()
	const n = 500
	for i := range n {
		pub.Publish("pilot.flood", []byte(fmt.Sprint(i)))
	}
	if err := pub.Flush(); err != nil {
		t.Fatal(err)
	}
	if err := b.Conn().Flush(); err != nil { // every message has reached the subscriber's client
		t.Fatal(err)
	}
	dropped := m.busDropped.WithLabelValues(DropPendingLimit)
	checkFor(t, 5*time.Second, 10*time.Millisecond, func() error {
		total, _ := sub.Dropped()
		if got := testutil.ToFloat64(dropped); total == 0 || got != float64(total) {
			return fmt.Errorf("surmise_bus_dropped_total{reason=pending-limit} %v, the client dropped %d", got, total)
		}
		return nil
	})
	close(release)
	if lines := strings.Count(logged.String(), "bus error"); lines != 1 {
		t.Errorf("%d bus error lines for one flood, want 1:\n%s", lines, logged.String())
	}
	if got := testutil.ToFloat64(m.busDropped.WithLabelValues(DropOversize)); got != 0 {
		t.Errorf("oversize drops %v, want 0", got)
	}
}
