package daemon

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"os"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"surmise/config"
	"surmise/daemon/lease"
	"surmise/estimator"
)

// FleetOptions makes a daemon a member of a fleet (see FleetStore): it runs
// the estimators of the fleet's bucket that fall to it, instead of plant
// files.
//
// Each estimator has one owner, through a lease (package lease) on
// estimator.<name> in the leases bucket. Each daemon also holds a lease on
// member.<instance>, so that every member sees which daemons are alive; an
// estimator falls to the member that ranks first for it by rendezvous
// hashing of the estimator's and the members' names, so the estimators
// spread evenly and only the share of a daemon that comes or goes moves.
// A daemon waits (standby) for the leases of the estimators that fall to
// it and gives up those that no longer do, after it has stopped them: when
// a daemon dies its leases lapse after the TTL and the others take its
// estimators; when one comes back the others stop and release its share,
// which it then takes, so two daemons never publish for the same estimator
// (each tick also checks that its lease is still held).
//
// The owner saves each filter's state and covariance to the state bucket
// every CheckpointEvery and when it gives the estimator up; a new owner
// starts from that checkpoint when it was taken on the same model.
type FleetOptions struct {
	// Name is the fleet's name.
	Name string
	// Replicas of a bucket the daemon creates; 0: three on a cluster,
	// else one.
	Replicas int
	// LeaseTTL is the leases' time-to-live for a new leases bucket; 0
	// means lease.DefaultTTL (6 s: take-over within about 8 s).
	LeaseTTL time.Duration
	// CheckpointEvery is the time between checkpoints; 0 means
	// DefaultCheckpointEvery.
	CheckpointEvery time.Duration
}

// TriggerFleet is the trigger of a gains change that came from the fleet's
// bucket, in the audit trail.
const TriggerFleet = "fleet"

// fleetRunner is the fleet side of a daemon.
type fleetRunner struct {
	d     *Daemon
	store *FleetStore
	mgr   *lease.Manager
	every time.Duration
	self  string // instance

	kick   chan struct{}
	joined atomic.Bool        // the buckets are open (open)
	cancel context.CancelFunc // stops run
	done   chan struct{}      // closed when run has returned

	// Touched by the fleet goroutine only.
	member  *lease.Lease
	specs   map[string]*fleetSpec // the bucket's contents
	members map[string]bool       // the daemons alive, self included
	owned   map[string]*fleetEst  // estimators awaited or run

	mu      sync.Mutex
	running map[string]*Estimator // for health, readiness and Estimators
}

// fleetSpec is an estimator's files as last seen in the bucket.
type fleetSpec struct {
	plant, gains       []byte
	plantRev, gainsRev uint64
}

// fleetEst is an estimator this daemon awaits or runs.
type fleetEst struct {
	lease              *lease.Lease
	e                  *Estimator // nil until started
	remove             func()     // from the scheduler
	plantRev, gainsRev uint64     // of the files it runs
	failed             uint64     // plant revision that could not start, not retried
}

// fleetLease is the per-tick view of an estimator's ownership.
type fleetLease struct {
	lease   *lease.Lease
	retire  atomic.Bool      // set to stop: the next tick publishes nothing and checkpoints
	retired chan *Checkpoint // receives that last checkpoint
	every   uint64           // ticks between checkpoints
	latest  atomic.Pointer[Checkpoint]
}

// newFleetRunner makes the daemon's fleet side (New calls it, before any
// goroutine may look at d.fleet); startFleet starts it.
func newFleetRunner(d *Daemon) *fleetRunner {
	fo := d.opts.Fleet
	f := &fleetRunner{
		d: d, self: d.opts.Instance,
		every:   fo.CheckpointEvery,
		kick:    make(chan struct{}, 1),
		specs:   map[string]*fleetSpec{},
		members: map[string]bool{},
		owned:   map[string]*fleetEst{},
		running: map[string]*Estimator{},
	}
	if f.every == 0 {
		f.every = DefaultCheckpointEvery
	}
	return f
}

// startFleet starts the fleet's goroutines. It does not wait for the
// buckets: the fleet goroutine opens them, retrying every second while the
// servers cannot serve them (a node restarting, JetStream electing its
// leaders), so that a daemon may start before its cluster is whole.
func (d *Daemon) startFleet(g *Group) {
	f := d.fleet
	runCtx, cancel := context.WithCancel(context.Background())
	f.cancel, f.done = cancel, make(chan struct{})
	g.Go("fleet", func(ctx context.Context) error {
		defer close(f.done)
		stop := context.AfterFunc(ctx, cancel)
		defer stop()
		if !f.open(runCtx) {
			return nil
		}
		var wg sync.WaitGroup
		wg.Go(func() { f.checkpoints(runCtx) })
		defer wg.Wait()
		return f.run(runCtx)
	})
}

// open binds the fleet's buckets and opens the lease manager, retrying
// until it succeeds or ctx is done (false).
func (f *fleetRunner) open(ctx context.Context) bool {
	fo, d := f.d.opts.Fleet, f.d
	host, _ := os.Hostname()
	_, leases, _ := FleetBuckets(fo.Name)
	for warned := false; ; {
		octx, cancel := context.WithTimeout(ctx, drainTimeout)
		store, err := OpenFleet(octx, d.bus.Conn(), fo.Name, fo.Replicas, fo.LeaseTTL)
		if err == nil {
			f.mgr, err = lease.Open(octx, d.bus.Conn(), lease.Config{
				Bucket:  leases,
				Owner:   lease.Owner{Instance: d.opts.Instance, Host: host, PID: os.Getpid(), Started: time.Now().UTC()},
				Changed: func(string, bool) { f.poke() },
				Log:     d.log,
			})
		}
		cancel()
		if err == nil {
			f.store = store
			f.joined.Store(true)
			d.log.Info("fleet joined", "fleet", fo.Name, "instance", d.opts.Instance, "replicas", store.Replicas(), "lease_ttl", f.mgr.TTL())
			return true
		}
		if !warned {
			d.log.Warn("fleet: buckets not available yet, retrying every second", "fleet", fo.Name, "error", err)
			warned = true
		}
		select {
		case <-ctx.Done():
			return false
		case <-time.After(time.Second):
		}
	}
}

func (f *fleetRunner) poke() {
	select {
	case f.kick <- struct{}{}:
	default:
	}
}

// run watches the bucket and the members and reconciles what this daemon
// runs with what falls to it, until ctx is done; the daemon's shutdown then
// calls stopAll.
func (f *fleetRunner) run(ctx context.Context) error {
	files, err := f.store.files.WatchAll(ctx)
	if err != nil {
		return fmt.Errorf("fleet %s: watching the files: %w", f.store.name, err)
	}
	defer files.Stop()
	members, err := f.store.leases.Watch(ctx, fleetMemberKey+"*", jetstream.MetaOnly())
	if err != nil {
		return fmt.Errorf("fleet %s: watching the members: %w", f.store.name, err)
	}
	defer members.Stop()
	tick := time.NewTicker(f.mgr.Renew())
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case e := <-files.Updates():
			if e != nil {
				f.file(e)
			}
		case e := <-members.Updates():
			if e != nil {
				inst := strings.TrimPrefix(e.Key(), fleetMemberKey)
				f.members[inst] = e.Operation() == jetstream.KeyValuePut
			}
		case <-f.kick:
		case <-tick.C:
		}
		f.reconcile(ctx)
	}
}

// file records one change of the files bucket.
func (f *fleetRunner) file(e jetstream.KeyValueEntry) {
	key := e.Key()
	var name string
	var isPlant bool
	switch {
	case strings.HasPrefix(key, fleetPlantKey):
		name, isPlant = key[len(fleetPlantKey):], true
	case strings.HasPrefix(key, fleetGainsKey):
		name = key[len(fleetGainsKey):]
	default:
		return
	}
	s := f.specs[name]
	if s == nil {
		s = &fleetSpec{}
		f.specs[name] = s
	}
	del := e.Operation() != jetstream.KeyValuePut
	switch {
	case isPlant && del:
		s.plant, s.plantRev = nil, 0
	case isPlant:
		s.plant, s.plantRev = e.Value(), e.Revision()
	case del:
		s.gains, s.gainsRev = nil, 0
	default:
		s.gains, s.gainsRev = e.Value(), e.Revision()
	}
	if s.plant == nil && s.gains == nil {
		delete(f.specs, name)
	}
}

// rank returns the member an estimator falls to: the highest of the
// hashes of estimator and member (rendezvous hashing).
func rank(name string, members map[string]bool) string {
	best, bestH := "", uint64(0)
	for m, alive := range members {
		if !alive {
			continue
		}
		h := fnv.New64a()
		h.Write([]byte(name))
		h.Write([]byte{0})
		h.Write([]byte(m))
		if v := h.Sum64(); best == "" || v > bestH || (v == bestH && m < best) {
			best, bestH = m, v
		}
	}
	return best
}

// reconcile brings what this daemon awaits and runs in line with the
// bucket and the members.
func (f *fleetRunner) reconcile(ctx context.Context) {
	// Our own membership first: without it we take nothing.
	if f.member == nil || isDone(f.member.Done()) {
		l, err := f.mgr.Standby(fleetMemberKey + f.self)
		if err != nil {
			f.d.log.Warn("fleet: joining", "error", err)
		} else {
			f.member = l
		}
	}
	joined := f.member != nil && f.member.Held()
	if joined {
		f.members[f.self] = true
	}
	for name, s := range f.specs {
		if _, ok := f.owned[name]; ok || !joined || s.plant == nil || s.gains == nil || rank(name, f.members) != f.self {
			continue
		}
		l, err := f.mgr.Standby(fleetEstimatorKey + name)
		if err != nil {
			f.d.log.Warn("fleet: waiting for an estimator", "estimator", name, "error", err)
			continue
		}
		f.owned[name] = &fleetEst{lease: l}
	}
	for name, o := range f.owned {
		s := f.specs[name]
		wanted := joined && s != nil && s.plant != nil && s.gains != nil && rank(name, f.members) == f.self
		switch {
		case isDone(o.lease.Done()):
			// Lost (or lapsed while we could not renew): stop at once.
			f.stop(ctx, name, o, false)
			delete(f.owned, name)
		case !wanted:
			f.stop(ctx, name, o, true)
			delete(f.owned, name)
		case o.e == nil && o.lease.Held() && o.failed != s.plantRev:
			f.start(ctx, name, o, s)
		case o.e != nil && s.plantRev != o.plantRev:
			// A new plant file: run it from the checkpoint just saved.
			f.stop(ctx, name, o, false)
			o.e = nil
			if o.lease.Held() {
				f.start(ctx, name, o, s)
			}
		case o.e != nil && s.gainsRev != o.gainsRev:
			o.gainsRev = s.gainsRev
			src := fmt.Sprintf("fleet %s gains revision %d", f.store.name, s.gainsRev)
			if _, err := o.e.comm.Load(s.gains, src, Selection{}, TriggerFleet, Origin{Who: "fleet bucket " + f.store.name}); err != nil {
				f.d.log.Warn("fleet: gains refused, the running set is kept", "estimator", name, "revision", s.gainsRev, "error", err)
			}
		}
	}
}

func isDone(c <-chan struct{}) bool {
	select {
	case <-c:
		return true
	default:
		return false
	}
}

// start builds the estimator from its files and runs it, from its
// checkpoint when there is one for its model.
func (f *fleetRunner) start(ctx context.Context, name string, o *fleetEst, s *fleetSpec) {
	d := f.d
	fail := func(err error) {
		o.failed = s.plantRev
		d.log.Error("fleet: cannot run the estimator; it stays unpublished until its files change", "estimator", name, "error", err)
	}
	plant, err := config.ParsePlant(fleetPlantKey+name, s.plant)
	if err != nil {
		fail(err)
		return
	}
	if plant.Name != name {
		fail(fmt.Errorf("the plant file is named %q", plant.Name))
		return
	}
	gains, err := config.ParseGains(fleetGainsKey+name, s.gains, plant)
	if err != nil {
		fail(err)
		return
	}
	pr, err := estimator.Prepare(plant.Model, gains.Set(gains.Active).Set, plant.Gate)
	if err != nil {
		fail(err)
		return
	}
	e := newEstimator(d, PlantSpec{Plant: plant, Gains: gains}, pr)
	c, err := NewCommissioner(CommissionerOptions{
		Plant: plant, Gains: gains, Engine: e.engine, Metrics: e.metrics, Audit: d.comm.audit,
		Logger: d.log, MinDwell: d.opts.MinDwell, OnGains: func(g *config.GainsFile) { e.SetGains(g, true) },
	})
	if err != nil {
		e.metrics.Remove()
		fail(err)
		return
	}
	e.comm = c
	e.shadow = shadowLane{subject: ShadowSubject(e.subject), est: e.engine.NewEstimate()}
	e.shadow.est.Instance = d.opts.Instance
	e.fleet = &fleetLease{lease: o.lease, retired: make(chan *Checkpoint, 1),
		every: uint64(max(f.every/e.period, 1))}
	from := "the plant's initial state"
	if cp, err := f.store.Checkpoint(ctx, name); err != nil {
		d.log.Warn("fleet: checkpoint unreadable; starting from the plant's initial state", "estimator", name, "error", err)
	} else if cp != nil {
		if err := e.engine.restore(cp); err != nil {
			d.log.Warn("fleet: checkpoint not used", "estimator", name, "error", err)
		} else {
			from = fmt.Sprintf("the checkpoint of %s at %s (seq %d)", cp.Instance, cp.Time.UTC().Format(time.RFC3339), cp.Seq)
		}
	}
	if err := d.router.subscribe(d.bus.Conn(), e); err != nil {
		e.metrics.Remove()
		fail(err)
		return
	}
	d.comm.index.Add(c)
	o.e, o.plantRev, o.gainsRev = e, s.plantRev, s.gainsRev
	f.mu.Lock()
	f.running[name] = e
	f.mu.Unlock()
	o.remove = d.sched.Add(e.name, e.period, e.tick)
	d.log.Info("fleet: estimator started", "estimator", name, "from", from, "plant_revision", s.plantRev, "gains_revision", s.gainsRev)
}

// stop stops the estimator of o, if it runs, saves its last checkpoint and,
// with release, gives its lease up.
func (f *fleetRunner) stop(ctx context.Context, name string, o *fleetEst, release bool) {
	d := f.d
	if e := o.e; e != nil {
		// The next tick publishes nothing and hands its checkpoint over;
		// then the job goes.
		e.fleet.retire.Store(true)
		var cp *Checkpoint
		select {
		case cp = <-e.fleet.retired:
		case <-time.After(min(2*e.period+time.Second, 3*time.Second)):
			cp = e.fleet.latest.Load()
		}
		o.remove()
		d.router.unsubscribe(e)
		d.comm.index.Remove(name)
		f.mu.Lock()
		delete(f.running, name)
		f.mu.Unlock()
		e.metrics.Remove()
		// Saved only while the lease is ours: once lost, the next owner's
		// checkpoints are the ones that count.
		if cp != nil && o.lease.Held() {
			if err := f.store.SaveCheckpoint(ctx, cp); err != nil {
				d.log.Warn("fleet: last checkpoint not saved", "estimator", name, "error", err)
			}
		}
		d.log.Info("fleet: estimator stopped", "estimator", name, "released", release)
		o.e = nil
	}
	if release {
		if err := o.lease.Release(ctx); err != nil {
			d.log.Warn("fleet: releasing", "estimator", name, "error", err)
		}
	}
}

// checkpoints saves the running estimators' latest checkpoints every
// CheckpointEvery until ctx is done.
func (f *fleetRunner) checkpoints(ctx context.Context) {
	t := time.NewTicker(f.every)
	defer t.Stop()
	saved := map[string]uint64{}
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		for _, e := range f.runningList() {
			cp := e.fleet.latest.Load()
			if cp == nil || saved[e.name] == cp.Seq || !e.fleet.lease.Held() {
				continue
			}
			if err := f.store.SaveCheckpoint(ctx, cp); err != nil {
				f.d.log.Warn("fleet: checkpoint not saved", "estimator", e.name, "error", err)
				continue
			}
			saved[e.name] = cp.Seq
		}
	}
}

// runningList returns the running estimators, by name.
func (f *fleetRunner) runningList() []*Estimator {
	f.mu.Lock()
	defer f.mu.Unlock()
	out := make([]*Estimator, 0, len(f.running))
	for _, e := range f.running {
		out = append(out, e)
	}
	slices.SortFunc(out, func(a, b *Estimator) int { return strings.Compare(a.name, b.name) })
	return out
}

// stopAll stops run, then every estimator (their ticks still running, so
// that each hands over a last checkpoint), and releases every lease, so
// that the other members take over at once.
func (f *fleetRunner) stopAll() {
	if f.done == nil {
		return // never started
	}
	f.cancel()
	<-f.done
	ctx, cancel := context.WithTimeout(context.Background(), drainTimeout)
	defer cancel()
	for _, o := range f.owned {
		if o.e != nil {
			o.e.fleet.retire.Store(true) // all at once: one tick's wait in all
		}
	}
	for name, o := range f.owned {
		f.stop(ctx, name, o, true)
	}
	if f.mgr == nil {
		return // never joined
	}
	if err := f.mgr.Close(ctx); err != nil && !errors.Is(err, lease.ErrClosed) {
		f.d.log.Warn("fleet: releasing the leases", "error", err)
	}
}

// fleetTick is the fleet's part of an estimator's tick, before it
// publishes: it reports whether the tick may publish (the lease is held and
// the estimator is not being stopped), and takes a checkpoint every few
// seconds and on the last tick.
func (e *Estimator) fleetTick() bool {
	fl := e.fleet
	if fl.retire.Load() {
		select {
		case fl.retired <- e.engine.checkpoint(e.est):
		default:
		}
		return false
	}
	if !fl.lease.Held() {
		return false
	}
	if e.est.Seq%fl.every == 0 {
		fl.latest.Store(e.engine.checkpoint(e.est))
	}
	return true
}
