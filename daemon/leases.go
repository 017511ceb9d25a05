package daemon

import (
	"context"
	"errors"
	"fmt"
	"strings"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"surmise/daemon/lease"
)

// DefaultLeaseBucket is the JetStream key-value bucket of the estimators'
// leases: one entry per estimator name, naming the daemon that runs it.
const DefaultLeaseBucket = "surmise-leases"

// leaseOpenTimeout bounds the binding of the bucket and each first attempt.
const leaseOpenTimeout = 5 * time.Second

// leasing is the daemon's side of the one-writer rule: before an estimator
// publishes, its daemon holds the estimator's lease on the bus (package
// lease). A second daemon for the same estimator is refused, or with
// Options.Standby waits and takes over when the lease lapses.
type leasing struct {
	mgr *lease.Manager
	// off is set when the server has no JetStream: the daemon runs without
	// leases (and says so), publishing whenever connected.
	off atomic.Bool
	// waiting describes the leases awaited, for /readyz; empty when none.
	waiting atomic.Pointer[string]
}

// mayPublish reports whether e may publish its estimates now: its daemon
// holds its lease, or runs without leases.
func (e *Estimator) mayPublish() bool {
	if e.d.leases.off.Load() {
		return true
	}
	l := e.lease.Load()
	return l != nil && l.Held()
}

// takeLeases binds the lease bucket and takes the lease of every estimator.
// Without Standby a lease held by another daemon is an error naming it;
// with Standby the estimators whose lease is held are left waiting and
// their leases are returned for the caller to wait on.
func (d *Daemon) takeLeases(nc *nats.Conn) (awaited []*lease.Lease, err error) {
	ctx, cancel := context.WithTimeout(context.Background(), leaseOpenTimeout)
	defer cancel()
	bucket := d.opts.LeaseBucket
	if bucket == "" {
		bucket = DefaultLeaseBucket
	}
	changed := func(key string, held bool) {
		if held {
			d.log.Info("estimator's lease held: publishing", "estimator", key)
		}
	}
	mgr, err := lease.Open(ctx, nc, lease.Config{Bucket: bucket, TTL: d.opts.LeaseTTL, Log: d.log, Changed: changed})
	if errors.Is(err, jetstream.ErrJetStreamNotEnabled) || errors.Is(err, jetstream.ErrJetStreamNotEnabledForAccount) ||
		errors.Is(err, nats.ErrNoResponders) {
		d.leases.off.Store(true)
		d.log.Warn("the NATS server has no JetStream: running without the one-writer lease; nothing stops a second daemon from publishing the same estimates")
		return nil, nil
	}
	if err != nil {
		return nil, fmt.Errorf("taking the estimators' leases: %w", err)
	}
	d.leases.mgr = mgr
	var held []string
	for _, e := range d.estimators {
		l, err := mgr.Acquire(ctx, e.name)
		var taken *lease.HeldError
		switch {
		case err == nil:
			e.lease.Store(l)
			continue
		case !errors.As(err, &taken):
			return nil, fmt.Errorf("estimator %s: taking its lease: %w", e.name, err)
		case !d.opts.Standby:
			return nil, fmt.Errorf("estimator %s runs in another daemon (lease %s in bucket %s): %w; stop that one, or start this one as its standby (--standby)", e.name, e.name, bucket, err)
		}
		l, err = mgr.Standby(e.name)
		if err != nil {
			return nil, err
		}
		e.lease.Store(l)
		awaited = append(awaited, l)
		held = append(held, taken.Error())
		d.log.Info("standing by: another daemon runs this estimator", "estimator", e.name, "holder", taken.Owner.String(), "since", taken.Owner.Since)
	}
	if len(held) > 0 {
		s := "standby: estimator " + strings.Join(held, "; estimator ")
		d.leases.waiting.Store(&s)
	}
	return awaited, nil
}

// awaitLeases waits until every lease of awaited is taken, or ctx ends.
func (d *Daemon) awaitLeases(ctx context.Context, awaited []*lease.Lease) error {
	for _, l := range awaited {
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-l.Acquired():
			d.log.Info("took over the estimator: its lease lapsed or was released", "estimator", l.Key())
		}
	}
	d.leases.waiting.Store(nil)
	return nil
}

// watchLeases notices a lost lease — not renewed in time (a stalled or
// unreachable server) or taken by another daemon — whose estimator's
// estimates mayPublish already withholds, and waits to take it again:
// at once when the server comes back and nobody took it, else as the
// standby of the daemon that did.
func (d *Daemon) watchLeases(ctx context.Context) error {
	t := time.NewTicker(250 * time.Millisecond)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-t.C:
		}
		for _, e := range d.estimators {
			l := e.lease.Load()
			if l == nil {
				continue
			}
			select {
			case <-l.Lost():
			default:
				continue
			}
			d.log.Error("estimator's lease lost: its estimates are withheld until this daemon holds it again", "estimator", e.name)
			nl, err := d.leases.mgr.Standby(e.name)
			if err != nil {
				return fmt.Errorf("estimator %s: waiting for its lease again: %w", e.name, err)
			}
			e.lease.Store(nl)
		}
	}
}

// releaseLeases gives the leases up at shutdown, so that a standby takes
// over at once. It waits at most leaseReleaseWait: on a stalled server the
// release cannot finish, the leases lapse after their TTL instead, and the
// stop goes on. The returned function waits for the release to end, which
// it does once the bus is closed.
func (d *Daemon) releaseLeases() (wait func()) {
	if d.leases.mgr == nil {
		return func() {}
	}
	done := make(chan struct{})
	go func() {
		defer close(done)
		ctx, cancel := context.WithTimeout(context.Background(), leaseReleaseWait)
		defer cancel()
		if err := d.leases.mgr.Close(ctx); err != nil {
			d.log.Warn("leases not released; a standby takes over when they lapse", "error", err, "ttl", d.leases.mgr.TTL())
		}
	}()
	select {
	case <-done:
	case <-time.After(leaseReleaseWait):
		d.log.Warn("leases not released in time; a standby takes over when they lapse", "ttl", d.leases.mgr.TTL())
	}
	return func() { <-done }
}

// leaseReleaseWait bounds the release of the leases at a stop.
const leaseReleaseWait = 300 * time.Millisecond

// startLeases takes the estimators' leases before anything is published.
// When the server is reachable this happens now, and a refusal stops the
// start-up; otherwise a goroutine takes them once connected (a refusal
// then stops the daemon). Standby leases are awaited in the background.
// Either way a goroutine stops the daemon when a held lease is lost.
func (d *Daemon) startLeases(g *Group, nc *nats.Conn) error {
	wait := func(ctx context.Context, awaited []*lease.Lease) error {
		if err := d.awaitLeases(ctx, awaited); err != nil {
			return nil // stopped while standing by
		}
		return d.watchLeases(ctx)
	}
	if nc.IsConnected() {
		awaited, err := d.takeLeases(nc)
		if err != nil {
			return err
		}
		g.Go("lease", func(ctx context.Context) error { return wait(ctx, awaited) })
		return nil
	}
	s := "no lease yet: the bus is not connected"
	d.leases.waiting.Store(&s)
	g.Go("lease", func(ctx context.Context) error {
		t := time.NewTicker(100 * time.Millisecond)
		defer t.Stop()
		for !nc.IsConnected() {
			select {
			case <-ctx.Done():
				return nil
			case <-t.C:
			}
		}
		d.leases.waiting.Store(nil)
		awaited, err := d.takeLeases(nc)
		if err != nil {
			return err
		}
		return wait(ctx, awaited)
	})
	return nil
}
