package daemon

import (
	"context"
	"errors"
	"fmt"
	"sync"
)

// Group tracks the long-lived goroutines of a daemon. Every goroutine starts
// through [Group.Go]; [Group.Stop] cancels them all and waits for them. The
// first goroutine to return an error cancels the others too, so one failed
// part (an HTTP listener that died) brings the whole daemon down in order
// instead of leaving it half alive.
//
// A Group starts no goroutine of its own. The zero value is not usable; call
// [NewGroup].
type Group struct {
	ctx    context.Context
	cancel context.CancelFunc

	mu      sync.Mutex
	wg      sync.WaitGroup
	stopped bool
	errs    []error
}

// NewGroup returns a group whose goroutines see a context derived from
// parent: it is cancelled when parent is, when Stop is called, or when one of
// the goroutines returns an error.
func NewGroup(parent context.Context) *Group {
	ctx, cancel := context.WithCancel(parent)
	return &Group{ctx: ctx, cancel: cancel}
}

// Go starts fn in a tracked goroutine and reports whether it did: after Stop
// has been called it starts nothing and returns false. A non-nil error from
// fn is recorded under name and cancels the group; an error that is the
// group's own cancellation (context.Canceled) is not recorded.
func (g *Group) Go(name string, fn func(ctx context.Context) error) bool {
	g.mu.Lock()
	defer g.mu.Unlock()
	if g.stopped {
		return false
	}
	g.wg.Add(1)
	go func() {
		defer g.wg.Done()
		if err := fn(g.ctx); err != nil && !errors.Is(err, context.Canceled) {
			g.mu.Lock()
			g.errs = append(g.errs, fmt.Errorf("%s: %w", name, err))
			g.mu.Unlock()
			g.cancel()
		}
	}()
	return true
}

// Done is closed when the group has been told to stop: by its parent
// context, by Stop, or by a goroutine's error. A daemon's main function waits
// on it, then calls Stop.
func (g *Group) Done() <-chan struct{} { return g.ctx.Done() }

// Stop cancels every goroutine of the group, waits until all have returned
// and returns their errors joined (nil if none failed). It may be called any
// number of times, from any goroutine except one of the group's own; every
// call waits and returns the same errors.
func (g *Group) Stop() error {
	g.mu.Lock()
	g.stopped = true
	g.mu.Unlock()
	g.cancel()
	g.wg.Wait()
	g.mu.Lock()
	defer g.mu.Unlock()
	return errors.Join(g.errs...)
}
