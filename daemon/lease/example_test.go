package lease_test

import (
	"context"
	"errors"
	"fmt"
	"os"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"

	"surmise/daemon/lease"
)

// Two processes compete for one estimator: the first takes the lease, the
// second is refused with the holder's name, then stands by and takes over
// when the first releases it.
func Example() {
	dir, _ := os.MkdirTemp("", "lease-example")
	defer os.RemoveAll(dir)
	ns, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, JetStream: true, StoreDir: dir, NoSigs: true, NoLog: true})
	if err != nil {
		fmt.Println(err)
		return
	}
	ns.Start()
	defer ns.Shutdown()
	if !ns.ReadyForConnections(5e9) {
		fmt.Println("server not ready")
		return
	}
	ctx := context.Background()
	open := func(instance string) *lease.Manager {
		nc, err := nats.Connect(ns.ClientURL())
		if err != nil {
			panic(err)
		}
		m, err := lease.Open(ctx, nc, lease.Config{Bucket: "surmise-leases", Owner: lease.Owner{Instance: instance, Host: "plant-pc", PID: 1}})
		if err != nil {
			panic(err)
		}
		return m
	}
	first, second := open("first"), open("second")
	defer second.Close(ctx)

	held, _ := first.Acquire(ctx, "hot-water-loop")
	_, err = second.Acquire(ctx, "hot-water-loop")
	var refused *lease.HeldError
	if errors.As(err, &refused) {
		fmt.Println("refused: held by", refused.Owner)
	}
	standby, _ := second.Standby("hot-water-loop")
	held.Release(ctx)
	<-standby.Acquired()
	fmt.Println("standby holds it:", standby.Held())
	first.Close(ctx)
	// Output:
	// refused: held by instance first (host plant-pc, pid 1)
	// standby holds it: true
}
