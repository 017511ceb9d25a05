package daemon

import (
	"context"
	"errors"
	"strings"
	"testing"
)

func TestGroupStopWaitsForAll(t *testing.T) {
	g := NewGroup(context.Background())
	const n = 5
	finished := make(chan int, n)
	for i := range n {
		if !g.Go("worker", func(ctx context.Context) error {
			<-ctx.Done()
			finished <- i
			return ctx.Err() // the group's own cancellation is not an error
		}) {
			t.Fatalf("Go refused goroutine %d before Stop", i)
		}
	}
	if err := g.Stop(); err != nil {
		t.Fatalf("Stop = %v, want nil", err)
	}
	// Stop returned, so every goroutine has already sent.
	if got := len(finished); got != n {
		t.Fatalf("%d goroutines finished when Stop returned, want %d", got, n)
	}
	if g.Go("late", func(context.Context) error { return nil }) {
		t.Fatal("Go started a goroutine after Stop")
	}
	if err := g.Stop(); err != nil { // idempotent
		t.Fatalf("second Stop = %v, want nil", err)
	}
}

func TestGroupFirstErrorCancelsOthers(t *testing.T) {
	g := NewGroup(context.Background())
	boom := errors.New("listener died")
	g.Go("waiter", func(ctx context.Context) error {
		<-ctx.Done()
		return nil
	})
	g.Go("http", func(context.Context) error { return boom })
	<-g.Done() // closed by the failing goroutine, not by Stop
	err := g.Stop()
	if !errors.Is(err, boom) {
		t.Fatalf("Stop = %v, want it to wrap %v", err, boom)
	}
	if !strings.Contains(err.Error(), "http: listener died") {
		t.Fatalf("Stop = %q, want the goroutine's name in it", err)
	}
	if err2 := g.Stop(); !errors.Is(err2, boom) {
		t.Fatalf("second Stop = %v, want the same error", err2)
	}
}

func TestGroupParentCancel(t *testing.T) {
	parent, cancel := context.WithCancel(context.Background())
	g := NewGroup(parent)
	g.Go("waiter", func(ctx context.Context) error {
		<-ctx.Done()
		return context.Cause(ctx)
	})
	cancel()
	<-g.Done()
	if err := g.Stop(); err != nil {
		t.Fatalf("Stop after parent cancel = %v, want nil", err)
	}
}
