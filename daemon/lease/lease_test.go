package lease

import (
	"context"
	"errors"
	"fmt"
	"runtime"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	natsserver "github.com/nats-io/nats-server/v2/test"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// runServer starts a real NATS server with JetStream on a random loopback
// port, stopped at the end of the test.
func runServer(t *testing.T) *server.Server {
	t.Helper()
	opts := natsserver.DefaultTestOptions
	opts.Port = -1
	opts.JetStream = true
	opts.StoreDir = t.TempDir()
	ns := natsserver.RunServer(&opts)
	t.Cleanup(ns.Shutdown)
	return ns
}

func connect(t *testing.T, ns *server.Server) *nats.Conn {
	t.Helper()
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	return nc
}

func open(t *testing.T, nc *nats.Conn, cfg Config) *Manager {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	m, err := Open(ctx, nc, cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { m.Close(context.Background()) })
	return m
}

func within(t *testing.T, ch <-chan struct{}, d time.Duration, what string) time.Time {
	t.Helper()
	select {
	case <-ch:
		return time.Now()
	case <-time.After(d):
		t.Fatalf("%s: not within %v", what, d)
	}
	return time.Time{}
}

func TestSecondHolderRefusedWithOwner(t *testing.T) {
	ns := runServer(t)
	ctx := context.Background()
	a := open(t, connect(t, ns), Config{Bucket: "leases", TTL: 3 * time.Second})
	b := open(t, connect(t, ns), Config{Bucket: "leases"})
	if b.TTL() != 3*time.Second {
		t.Errorf("second manager's TTL %v, want the bucket's 3s", b.TTL())
	}
	la, err := a.Acquire(ctx, "hot-water-loop")
	if err != nil {
		t.Fatal(err)
	}
	if !la.Held() {
		t.Fatal("acquired lease not held")
	}
	_, err = b.Acquire(ctx, "hot-water-loop")
	var held *HeldError
	if !errors.As(err, &held) {
		t.Fatalf("second acquire: %v, want a HeldError", err)
	}
	self := a.Self()
	if held.Owner.Instance != self.Instance || held.Owner.PID != self.PID || held.Owner.Host != self.Host {
		t.Errorf("holder %+v, want %+v", held.Owner, self)
	}
	msg := err.Error()
	for _, want := range []string{"hot-water-loop", "held by instance " + self.Instance, "since " + la.Since().Format(time.RFC3339)} {
		if !strings.Contains(msg, want) {
			t.Errorf("refusal %q lacks %q", msg, want)
		}
	}
	// The same manager may not take the key twice either.
	if _, err := a.Acquire(ctx, "hot-water-loop"); err == nil {
		t.Error("a second Acquire of a held key in the same manager succeeded")
	}
	// Another key is free.
	if _, err := b.Acquire(ctx, "dryer"); err != nil {
		t.Errorf("free key: %v", err)
	}
}

func TestStandbyTakesOverOnRelease(t *testing.T) {
	ns := runServer(t)
	ctx := context.Background()
	a := open(t, connect(t, ns), Config{Bucket: "leases", TTL: 30 * time.Second})
	b := open(t, connect(t, ns), Config{Bucket: "leases"})
	la, err := a.Acquire(ctx, "k")
	if err != nil {
		t.Fatal(err)
	}
	lb, err := b.Standby("k")
	if err != nil {
		t.Fatal(err)
	}
	if lb.Held() {
		t.Fatal("standby holds a held key")
	}
	// Not taken while the holder renews (several renewals of 10 s each
	// would be too slow; one look suffices that it is still waiting).
	select {
	case <-lb.Acquired():
		t.Fatal("standby took a held lease")
	case <-time.After(200 * time.Millisecond):
	}
	start := time.Now()
	if err := la.Release(ctx); err != nil {
		t.Fatal(err)
	}
	// A clean release is seen through the watch, long before the 10 s
	// renewal interval of this bucket.
	within(t, lb.Acquired(), 3*time.Second, "standby after a release")
	t.Logf("take-over after a release: %v", time.Since(start))
	select {
	case <-la.Lost():
		t.Error("a released lease reports itself lost")
	default:
	}
	if la.Held() || !lb.Held() {
		t.Errorf("after take-over: old held %v, new held %v", la.Held(), lb.Held())
	}
}

// A holder that vanishes without releasing (its connection closed) loses
// the lease before the standby can take it over, and the standby takes it
// within TTL plus a renewal or two.
func TestLapseOfDeadHolder(t *testing.T) {
	ns := runServer(t)
	ctx := context.Background()
	const ttl = 1500 * time.Millisecond
	nca := connect(t, ns)
	a := open(t, nca, Config{Bucket: "leases", TTL: ttl})
	b := open(t, connect(t, ns), Config{Bucket: "leases"})
	la, err := a.Acquire(ctx, "k")
	if err != nil {
		t.Fatal(err)
	}
	lb, err := b.Standby("k")
	if err != nil {
		t.Fatal(err)
	}
	// Let a few renewals pass: the lease outlives its first TTL.
	deadline := time.Now().Add(2 * ttl)
	for time.Now().Before(deadline) {
		if lb.Held() {
			t.Fatal("standby took a lease that is being renewed")
		}
		select {
		case <-la.Lost():
			t.Fatal("a renewed lease was lost")
		case <-time.After(50 * time.Millisecond):
		}
	}
	start := time.Now()
	nca.Close() // the holder can no longer renew
	lostAt := within(t, la.Lost(), ttl, "holder noticing its loss")
	takenAt := within(t, lb.Acquired(), ttl+2*time.Second, "standby take-over")
	if !lostAt.Before(takenAt) {
		t.Errorf("holder gave up at %v, standby took over at %v: they overlapped", lostAt.Sub(start), takenAt.Sub(start))
	}
	t.Logf("holder gave up after %v, standby took over after %v (TTL %v)", lostAt.Sub(start), takenAt.Sub(start), ttl)
	if la.Held() {
		t.Error("lost lease still held")
	}
}

// A holder whose entry is overwritten by someone else learns it at its next
// renewal.
func TestLostWhenTaken(t *testing.T) {
	ns := runServer(t)
	ctx := context.Background()
	var changes []string
	nc := connect(t, ns)
	a := open(t, nc, Config{Bucket: "leases", TTL: 1200 * time.Millisecond, Changed: func(k string, held bool) {
		changes = append(changes, fmt.Sprintf("%s=%v", k, held))
	}})
	la, err := a.Acquire(ctx, "k")
	if err != nil {
		t.Fatal(err)
	}
	js, _ := jetstream.New(connect(t, ns))
	kv, err := js.KeyValue(ctx, "leases")
	if err != nil {
		t.Fatal(err)
	}
	if _, err := kv.Put(ctx, "k", []byte(`{"instance":"intruder"}`)); err != nil {
		t.Fatal(err)
	}
	within(t, la.Lost(), 2*time.Second, "loss of an overwritten lease")
	a.Close(ctx) // the loop has stopped: changes is ours to read
	if got := strings.Join(changes, " "); got != "k=true k=false" {
		t.Errorf("Changed calls %q, want %q", got, "k=true k=false")
	}
	// The intruder's entry stays: a lost lease is not deleted on Close.
	o, ok, err := a.Holder(ctx, "k")
	if err != nil || !ok || o.Instance != "intruder" {
		t.Errorf("holder after loss: %+v %v %v", o, ok, err)
	}
}

// Many leases share one renewal goroutine: the goroutine count does not grow
// with them, they are all renewed past several TTLs, and Close frees them
// all for another process.
func TestManyLeasesOneLoop(t *testing.T) {
	ns := runServer(t)
	ctx := context.Background()
	const n = 200
	const ttl = 1500 * time.Millisecond
	a := open(t, connect(t, ns), Config{Bucket: "fleet", TTL: ttl})
	before := runtime.NumGoroutine()
	ls := make([]*Lease, n)
	for i := range ls {
		l, err := a.Acquire(ctx, fmt.Sprintf("est-%03d", i))
		if err != nil {
			t.Fatal(err)
		}
		ls[i] = l
	}
	if grew := runtime.NumGoroutine() - before; grew > 5 {
		t.Errorf("%d leases added %d goroutines", n, grew)
	}
	b := open(t, connect(t, ns), Config{Bucket: "fleet"})
	waits := make([]*Lease, n)
	for i := range waits {
		l, err := b.Standby(fmt.Sprintf("est-%03d", i))
		if err != nil {
			t.Fatal(err)
		}
		waits[i] = l
	}
	end := time.Now().Add(3 * ttl)
	for time.Now().Before(end) {
		for i, l := range ls {
			if !l.Held() {
				t.Fatalf("lease %d lost while renewed", i)
			}
		}
		time.Sleep(100 * time.Millisecond) // sampling the state, not waiting for it
	}
	if err := a.Close(ctx); err != nil {
		t.Fatal(err)
	}
	for i, l := range waits {
		within(t, l.Acquired(), 5*time.Second, fmt.Sprintf("standby %d after Close", i))
	}
}

func TestOpenRefusesBadConfig(t *testing.T) {
	ns := runServer(t)
	nc := connect(t, ns)
	ctx := context.Background()
	if _, err := Open(ctx, nc, Config{}); err == nil {
		t.Error("no bucket accepted")
	}
	js, _ := jetstream.New(nc)
	if _, err := js.CreateKeyValue(ctx, jetstream.KeyValueConfig{Bucket: "forever"}); err != nil {
		t.Fatal(err)
	}
	if _, err := Open(ctx, nc, Config{Bucket: "forever"}); err == nil || !strings.Contains(err.Error(), "no TTL") {
		t.Errorf("bucket without TTL: %v", err)
	}
}
