package daemon

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	sd "github.com/coreos/go-systemd/v22/daemon"
	"github.com/nats-io/nats-server/v2/server"
	"github.com/prometheus/client_golang/prometheus"

	"surmise/config"
	"surmise/estimator"
)

// drainTimeout bounds the confirmation of the subscriptions at start-up and
// the drain of a recorder.
const drainTimeout = 5 * time.Second

// stopDrainTimeout bounds the NATS drain at a stop (subscriptions, then the
// pending publishes): a stop must be quick whatever the server does, and
// what could not drain is logged, not failed.
const stopDrainTimeout = 500 * time.Millisecond

// PlantSpec is one estimator for a Daemon to run: a validated plant file and
// its gains file, loaded for that plant (config.LoadGains). The daemon runs
// the gains file's active set.
type PlantSpec struct {
	Plant *config.Plant
	Gains *config.GainsFile
	// GainsBytes, when not nil, are the bytes Gains was parsed from, for
	// gains that are not in the file the plant names (built into the
	// program, say): their SHA-256 is what a status reports as in effect.
	GainsBytes []byte
}

// EstimateSubject returns the subject the estimates of plant are published
// on: "<publish prefix>.estimate", by default surmise.<name>.estimate.
func EstimateSubject(plant *config.Plant) string {
	return plant.PublishPrefix() + ".estimate"
}

// Options configures a Daemon. A zero field means its default; New sets the
// defaults (in one place, setDefaults) and checks the rest.
type Options struct {
	// Plants are the estimators to run: at least one, with distinct names.
	Plants []PlantSpec

	// Bus says how to reach NATS. With neither Bus.URL nor Bus.Embedded
	// the daemon starts its own server in-process (see EmbeddedPort and
	// StateDir) and shuts it down when it stops; a server given in
	// Bus.Embedded belongs to the caller.
	Bus BusOptions

	// EmbeddedPort is the loopback port of the daemon's own server, as in
	// EmbeddedOptions.Port: 0 means DefaultEmbeddedPort when it is free,
	// else a random free port; -1 always a random free port.
	EmbeddedPort int

	// Listen is the HTTP address of /metrics, /healthz and /readyz;
	// default DefaultHTTPAddr. Port 0 picks a free port (see
	// Endpoints.HTTPAddr).
	Listen string

	// Logger receives the daemon's log; nil means none. The daemon never
	// logs per tick. A refused sample is logged at once with its reason;
	// further refusals of the same signal within RefusedLogInterval are
	// counted and summarised in one line (how many, the latest reason) when
	// the interval is over.
	Logger *slog.Logger

	// RefusedLogInterval is the shortest time between two log lines about
	// refused samples of one signal; 0 means 10 s.
	RefusedLogInterval time.Duration

	// Registry receives the daemon's metrics, and /metrics serves it. Nil
	// means a new registry, with the Go runtime, process and build
	// information collectors as well.
	Registry *prometheus.Registry

	// Instance names this daemon in every estimate it publishes
	// ("instance") and, in a fleet, as the owner of its estimators; empty
	// means DefaultInstance().
	Instance string

	// Fleet, when set, makes the daemon a member of a fleet: it runs the
	// estimators of the fleet's bucket that fall to it (see FleetOptions),
	// and Plants must be empty. It needs a NATS server with JetStream.
	Fleet *FleetOptions

	// Metrics is how many series each estimator has: MetricsFull (the
	// zero value) or, for a fleet of many estimators, MetricsSummary.
	Metrics MetricsLevel

	// StateDir holds the embedded server's JetStream store (under
	// StateDir/nats). Empty means a temporary directory, removed when the
	// daemon stops.
	StateDir string

	// Scheduler configures the one tick scheduler of the process: its
	// clock source (SchedulerOptions.PortableTimer) and its workers.
	Scheduler SchedulerOptions

	// Notify sends a state to the service manager ("READY=1",
	// "WATCHDOG=1", "STOPPING=1"). Nil means sd_notify, which does nothing
	// when the process was not started by systemd (no NOTIFY_SOCKET).
	Notify func(state string) error

	// WatchdogInterval is how often the daemon tells the service manager
	// it is alive ("WATCHDOG=1", sent only while Healthy). Zero means half
	// the interval systemd asks for (WATCHDOG_USEC), or never when it asks
	// for none; negative means never.
	WatchdogInterval time.Duration

	// MinDwell is the shortest time between two swaps of the active gain
	// set by promote or roll-back (control service); zero means
	// DefaultMinDwell, negative none.
	MinDwell time.Duration

	// ReloadDebounce is how long the watcher of the plant and gains files'
	// directories waits for quiet before it reads them again; zero means
	// DefaultDebounce, negative turns the watcher off (SIGHUP, Reload and
	// the control service still reload).
	ReloadDebounce time.Duration

	// Standby makes the daemon wait for an estimator that another daemon
	// runs on the same bus, instead of refusing to start: it subscribes and
	// ticks (so its estimate is current) but publishes nothing, and its
	// /readyz fails, until the other daemon's lease on the estimator lapses
	// or is released; then it takes over.
	Standby bool

	// LeaseBucket is the JetStream key-value bucket of the estimators'
	// leases; empty means DefaultLeaseBucket. LeaseTTL is how long a lease
	// outlives its last renewal (a dead daemon's estimators are taken over
	// after about that long); zero means lease.DefaultTTL, and an existing
	// bucket keeps its own.
	LeaseBucket string
	LeaseTTL    time.Duration

	// Started, when not nil, is called once by Run when the daemon has
	// started — server up, listeners bound, subscriptions made, ticks
	// scheduled — with the addresses it uses.
	Started func(Endpoints)
}

// Endpoints are the addresses a running Daemon uses.
type Endpoints struct {
	// BusURL is the URL of the NATS server: the embedded server's client
	// URL on 127.0.0.1, or Options.Bus.URL.
	BusURL string
	// Embedded is true when the daemon runs its own server.
	Embedded bool
	// HTTPAddr is the address the HTTP server listens on.
	HTTPAddr net.Addr
	// StateDir is the directory of the embedded server's store (under
	// StateDir/nats); empty when the daemon runs no server.
	StateDir string
	// LocalAccess is the directory of the local access files (nats.url,
	// nats.user) of the embedded server, where local clients find it;
	// empty when the daemon runs no server or could not write them.
	LocalAccess string
}

// setDefaults fills in the zero fields of o that have a default.
func (o *Options) setDefaults() {
	if o.Listen == "" {
		o.Listen = DefaultHTTPAddr
	}
	if o.Logger == nil {
		o.Logger = slog.New(slog.DiscardHandler)
	}
	if o.Instance == "" {
		o.Instance = DefaultInstance()
	}
	if o.RefusedLogInterval <= 0 {
		o.RefusedLogInterval = badSampleLogEvery
	}
	if o.Notify == nil {
		o.Notify = func(state string) error {
			_, err := sd.SdNotify(false, state)
			return err
		}
	}
}

// validate checks o after setDefaults and returns every problem found.
func (o *Options) validate() error {
	var errs []error
	switch f := o.Fleet; {
	case f == nil && len(o.Plants) == 0:
		errs = append(errs, errors.New("no plant to run"))
	case f != nil && len(o.Plants) > 0:
		errs = append(errs, fmt.Errorf("fleet %s: a fleet daemon runs the plants of its bucket, not plant files", f.Name))
	case f != nil:
		if err := CheckFleetName(f.Name); err != nil {
			errs = append(errs, err)
		}
		if !instanceName.MatchString(o.Instance) {
			errs = append(errs, fmt.Errorf("instance %q: in a fleet, want letters, digits, '-', '_', '=' or '.' (at most 128)", o.Instance))
		}
		if f.LeaseTTL != 0 && f.LeaseTTL < time.Second || f.CheckpointEvery < 0 || f.Replicas < 0 {
			errs = append(errs, fmt.Errorf("fleet %s: lease TTL %v (want 0 or at least 1 s), checkpoint interval %v, replicas %d", f.Name, f.LeaseTTL, f.CheckpointEvery, f.Replicas))
		}
	}
	seen := map[string]bool{}
	for i, p := range o.Plants {
		switch {
		case p.Plant == nil || p.Plant.Model == nil:
			errs = append(errs, fmt.Errorf("plant %d: no plant", i))
			continue
		case p.Gains == nil:
			errs = append(errs, fmt.Errorf("plant %s: no gains file", p.Plant.Name))
			continue
		}
		name := p.Plant.Name
		if seen[name] {
			errs = append(errs, fmt.Errorf("plant %s (%s): another plant file has the same name; estimator names must be unique in a daemon", name, p.Plant.Path))
		}
		seen[name] = true
		if fp := config.Fingerprint(p.Plant.Model); p.Gains.Fingerprint != fp {
			errs = append(errs, fmt.Errorf("plant %s: its gains were designed for model %s, the plant's model is %s", name, p.Gains.Fingerprint, fp))
		}
		if p.Gains.Set(p.Gains.Active) == nil {
			errs = append(errs, fmt.Errorf("plant %s: the active gain set %q is not in the gains file", name, p.Gains.Active))
		}
		if periodOf(p.Plant) <= 0 {
			errs = append(errs, fmt.Errorf("plant %s: sample time %v s is not a positive duration", name, p.Plant.Model.Ts))
		}
	}
	if o.Bus.URL == "" && o.Bus.Embedded == nil && (o.EmbeddedPort < -1 || o.EmbeddedPort > 65535) {
		errs = append(errs, fmt.Errorf("embedded server port %d: want 1 to 65535, 0 for the default or -1 for any free port", o.EmbeddedPort))
	}
	if _, _, err := net.SplitHostPort(o.Listen); err != nil {
		errs = append(errs, fmt.Errorf("HTTP listen address: %w", err))
	}
	if o.Scheduler.Workers < 0 {
		errs = append(errs, fmt.Errorf("scheduler workers %d: want 0 (one per CPU) or more", o.Scheduler.Workers))
	}
	if err := errors.Join(errs...); err != nil {
		return fmt.Errorf("daemon options: %w", err)
	}
	return nil
}

// DefaultInstance returns the instance name of a daemon that is given
// none: the host name and the process id, "host-1234" (in a Kubernetes pod,
// the pod's name and 1). Two daemons on one host differ by their process id.
func DefaultInstance() string {
	host, err := os.Hostname()
	if err != nil || host == "" {
		host = "localhost"
	}
	return fmt.Sprintf("%s-%d", host, os.Getpid())
}

// periodOf returns the tick period of a plant, its sample time.
func periodOf(p *config.Plant) time.Duration {
	return time.Duration(p.Model.Ts * float64(time.Second))
}

// Daemon runs estimators on the bus: one per plant, all ticked by one
// scheduler, each subscribed to its plant's signal subjects and publishing
// one estimate per tick; with an HTTP server for metrics, health and
// readiness, and sd_notify for systemd. Build it with New, run it with Run.
type Daemon struct {
	opts       Options
	log        *slog.Logger
	reg        *prometheus.Registry
	metrics    *Metrics
	sched      *Scheduler
	http       *HTTPServer
	estimators []*Estimator

	// epoch is read by New; tick and start times are kept as nanoseconds
	// since it (monotonic).
	epoch     time.Time
	started   atomic.Int64 // when Run started, 0 before
	scheduled atomic.Int64 // when the scheduler started, 0 before

	// listeners are the in-process subscribers to estimates (OnEstimate):
	// nil when there are none, so that a tick without listeners costs one
	// atomic load.
	listenMu  sync.Mutex
	listeners atomic.Pointer[[]*listener]

	ran atomic.Bool

	comm   *commissioning // reloads, audit, control service (reload.go)
	leases leasing        // the one-writer leases (leases.go)
	page   *Page          // the live page at / (page.go)

	// Set by Run.
	ns          *server.Server // the embedded server, when it is ours
	tempState   string         // a temporary state directory to remove
	localDirs   []string       // local access files to remove (local.go)
	bus         *Bus
	fleet       *fleetRunner  // in a fleet (fleet_run.go)
	router      *sampleRouter // the samples' dispatch path (dispatch.go)
	schedCancel context.CancelFunc
	schedDone   chan struct{}
}

// New checks opts, prepares every plant's active gain set, registers the
// metrics and builds one engine per plant. It starts no goroutine and opens
// nothing: Run does. When it refuses the options or a gain set, it has
// registered nothing.
func New(opts Options) (*Daemon, error) {
	opts.Plants = slices.Clone(opts.Plants)
	opts.setDefaults()
	if err := opts.validate(); err != nil {
		return nil, err
	}
	var errs []error
	prepared := make([]*estimator.Prepared, len(opts.Plants))
	for i, p := range opts.Plants {
		set := p.Gains.Set(p.Gains.Active).Set
		pr, err := estimator.Prepare(p.Plant.Model, set, p.Plant.Gate)
		if err != nil {
			errs = append(errs, fmt.Errorf("plant %s: %w", p.Plant.Name, err))
		}
		prepared[i] = pr
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}

	reg := opts.Registry
	if reg == nil {
		reg = prometheus.NewRegistry()
		if err := RegisterRuntime(reg); err != nil {
			return nil, err
		}
	}
	m, err := newMetrics(reg, opts.Metrics)
	if err != nil {
		return nil, err
	}
	d := &Daemon{
		opts:    opts,
		log:     opts.Logger,
		reg:     reg,
		metrics: m,
		sched:   NewScheduler(opts.Scheduler),
		epoch:   time.Now(),
	}
	var longest time.Duration
	for i, p := range opts.Plants {
		d.estimators = append(d.estimators, newEstimator(d, p, prepared[i]))
		longest = max(longest, periodOf(p.Plant))
	}
	if opts.Fleet != nil {
		d.fleet = newFleetRunner(d)
	}
	if err := d.newCommissioning(); err != nil {
		return nil, err
	}
	d.http, err = NewHTTPServer(HTTPOptions{
		Addr:      opts.Listen,
		Gatherer:  reg,
		LastTick:  d.lastTick,
		Staleness: stallLimit(longest),
		Ready:     d.missing,
		Log:       d.log,
	})
	if err != nil {
		return nil, err
	}
	if d.page, err = newDaemonPage(d); err != nil {
		return nil, err
	}
	return d, nil
}

// newMetrics is NewMetrics with an error instead of a panic when the
// registry already holds the daemon's metrics (two daemons on one registry:
// an embedder's mistake that New can report).
func newMetrics(reg prometheus.Registerer, level MetricsLevel) (m *Metrics, err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("daemon metrics: %v", r)
		}
	}()
	return NewMetricsLevel(reg, level), nil
}

// Estimators returns the daemon's estimators, in the order of
// Options.Plants; in a fleet, the estimators it runs now, by name.
func (d *Daemon) Estimators() []*Estimator { return d.all() }

// all returns the estimators of the plant files and those the daemon runs
// for its fleet now.
func (d *Daemon) all() []*Estimator {
	out := slices.Clone(d.estimators)
	if d.fleet != nil {
		out = append(out, d.fleet.runningList()...)
	}
	return out
}

// Metrics returns the daemon's metrics.
func (d *Daemon) Metrics() *Metrics { return d.metrics }

// Handle registers handler for pattern on the daemon's HTTP server, beside
// /metrics, /healthz and /readyz (the live page adds "GET /{$}"); see
// HTTPServer.Handle.
func (d *Daemon) Handle(pattern string, handler http.Handler) { d.http.Handle(pattern, handler) }

// now returns the time since the daemon's epoch in nanoseconds, at least 1.
func (d *Daemon) now() int64 { return max(int64(time.Since(d.epoch)), 1) }

// at turns a d.now reading back into a time.
func (d *Daemon) at(ns int64) time.Time { return d.epoch.Add(time.Duration(ns)) }

// Run starts the daemon, runs it until ctx is done or a part of it fails,
// then stops it in order and returns. It may be called once.
//
// Start-up: the embedded NATS server when no server is given (its URL is
// logged), the connection (which keeps retrying in the background when the
// server is not there yet), one subscription per signal subject of every
// estimator, the HTTP listener, one scheduled job per estimator at its
// plant's sample time; then READY=1 to the service manager.
//
// Shutdown: STOPPING=1; the ticks stop at a tick boundary (a tick that has
// started finishes, its publish included, and no other starts); the
// connection drains (subscriptions, then pending publishes) and closes; the
// HTTP server finishes its requests; the embedded server shuts down; a
// temporary state directory is removed. Every goroutine the daemon started
// has returned when Run does.
func (d *Daemon) Run(ctx context.Context) (err error) {
	if !d.ran.CompareAndSwap(false, true) {
		return errors.New("daemon: Run called twice")
	}
	g := NewGroup(ctx)
	defer func() { err = errors.Join(err, d.shutdown(g)) }()
	ep, err := d.start(g)
	if err != nil {
		return err
	}
	if err := d.opts.Notify(sd.SdNotifyReady); err != nil {
		d.log.Warn("sd_notify READY=1 failed", "error", err)
	}
	d.log.Info("daemon started", "bus", RedactURL(ep.BusURL), "embedded", ep.Embedded, "http", ep.HTTPAddr.String(), "estimators", len(d.estimators))
	for _, e := range d.estimators {
		// The ring of past ticks kept to fuse late samples at their own time.
		d.log.Info("estimator delay horizon", "estimator", e.name, "past_ticks_kept", e.engine.HorizonTicks(),
			"covers", time.Duration(e.engine.HorizonTicks())*e.period)
	}
	if d.opts.Started != nil {
		d.opts.Started(ep)
	}
	<-g.Done()
	return nil
}

// start brings the daemon up; on error, shutdown undoes what was done.
func (d *Daemon) start(g *Group) (Endpoints, error) {
	d.started.Store(d.now())
	var ep Endpoints
	// The HTTP address first: one in use stops the start before anything
	// else is started.
	if err := d.http.Listen(); err != nil {
		return ep, err
	}
	ep.HTTPAddr = d.http.Addr()
	bo := d.opts.Bus
	switch {
	case bo.Embedded != nil:
		ep.BusURL = bo.Embedded.ClientURL()
	case bo.URL != "":
		ep.BusURL = bo.URL
	default:
		dir := d.opts.StateDir
		if dir == "" {
			tmp, err := os.MkdirTemp("", "surmise-state-")
			if err != nil {
				return ep, fmt.Errorf("temporary state directory: %w", err)
			}
			d.tempState, dir = tmp, tmp
			d.log.Info("no state directory given: the embedded server's store is temporary", "dir", tmp)
		}
		pw, err := newLocalPassword()
		if err != nil {
			return ep, err
		}
		ns, err := StartEmbedded(EmbeddedOptions{Port: d.opts.EmbeddedPort, StoreDir: filepath.Join(dir, "nats"), Log: d.log,
			LocalPassword: pw, Anonymous: anonymousPermissions(d.opts.Plants)})
		if err != nil {
			return ep, err
		}
		d.ns, bo.Embedded, bo.User, bo.Password = ns, ns, LocalUser, pw
		ep.BusURL, ep.Embedded, ep.StateDir = ns.ClientURL(), true, dir
		ep.LocalAccess = d.writeLocalAccess(LocalAccess{URL: ns.ClientURL(), User: LocalUser, Password: pw})
	}

	bus, err := Connect(bo, d.metrics, d.log)
	if err != nil {
		return ep, err
	}
	d.bus = bus
	// A fleet daemon's estimators have the fleet's leases (fleet_run.go);
	// the leases of plant files are for the others.
	if d.fleet == nil {
		if err := d.startLeases(g, bus.Conn()); err != nil {
			return ep, err
		}
	}
	signals := 0
	for _, e := range d.estimators {
		signals += len(e.signals)
	}
	if d.opts.Fleet != nil {
		// Its estimators come later, as many as the fleet has: the
		// largest channels (a few hundred KiB).
		signals = shardMaxSlots
	}
	d.router = newSampleRouter(signals)
	d.router.start(g)
	for _, e := range d.estimators {
		if err := d.router.subscribe(bus.Conn(), e); err != nil {
			return ep, err
		}
	}
	if err := d.startCommissioning(g, bus.Conn()); err != nil {
		return ep, err
	}
	// A round trip, so that the server has every subscription (samples,
	// control service) when Started says so. Without a connection yet, they
	// are sent on connecting.
	if nc := bus.Conn(); nc.IsConnected() {
		if err := nc.FlushTimeout(drainTimeout); err != nil {
			d.log.Warn("bus: subscriptions not confirmed by the server", "error", err)
		}
	}

	// The fleet's estimators start ticking once the scheduler runs.
	if d.fleet != nil {
		d.startFleet(g)
	}

	g.Go("http", d.http.Serve)

	// The scheduler has a context of its own: shutdown stops the ticks
	// first, and waits for them, before it closes what they publish on.
	schedCtx, cancel := context.WithCancel(context.Background())
	d.schedCancel, d.schedDone = cancel, make(chan struct{})
	for _, e := range d.estimators {
		d.sched.Add(e.name, e.period, e.tick)
	}
	d.scheduled.Store(d.now())
	g.Go("scheduler", func(context.Context) error {
		defer close(d.schedDone)
		return d.sched.Run(schedCtx)
	})

	if every := d.watchdogInterval(); every > 0 {
		g.Go("watchdog", func(ctx context.Context) error {
			d.watchdog(ctx, every)
			return nil
		})
	}
	return ep, nil
}

// shutdown stops what start started, in order; see Run.
func (d *Daemon) shutdown(g *Group) error {
	if err := d.opts.Notify(sd.SdNotifyStopping); err != nil {
		d.log.Warn("sd_notify STOPPING=1 failed", "error", err)
	}
	d.log.Info("daemon stopping")
	var errs []error
	if d.fleet != nil {
		// While the ticks still run: each estimator hands over a last
		// checkpoint, and the leases are released for the others.
		d.fleet.stopAll()
	}
	if d.schedCancel != nil {
		d.schedCancel()
		<-d.schedDone
	}
	leasesReleased := d.releaseLeases()
	d.stopCommissioning()
	if d.router != nil {
		d.router.close()
	}
	if d.bus != nil {
		if err := d.bus.Close(stopDrainTimeout); err != nil {
			d.log.Warn("bus: closed without draining (pending samples and estimates dropped)", "error", err)
		}
	}
	leasesReleased()
	// The HTTP server stops with the group's context.
	if err := g.Stop(); err != nil {
		errs = append(errs, err)
	}
	if d.ns != nil {
		for _, dir := range d.localDirs {
			removeLocalAccess(dir)
		}
		d.ns.Shutdown()
		d.ns.WaitForShutdown()
	}
	if d.tempState != "" {
		if err := os.RemoveAll(d.tempState); err != nil {
			errs = append(errs, fmt.Errorf("removing the temporary state directory: %w", err))
		}
	}
	for _, e := range d.estimators {
		e.metrics.SetReady(false)
	}
	d.log.Info("daemon stopped")
	return errors.Join(errs...)
}

// watchdogInterval is how often to ping the service manager's watchdog, 0
// for never.
func (d *Daemon) watchdogInterval() time.Duration {
	switch w := d.opts.WatchdogInterval; {
	case w < 0:
		return 0
	case w > 0:
		return w
	}
	every, err := sd.SdWatchdogEnabled(false)
	if err != nil {
		d.log.Warn("systemd watchdog settings unreadable; not pinging it", "error", err)
		return 0
	}
	return every / 2
}

// watchdog sends WATCHDOG=1 every interval while the daemon is healthy: a
// tick loop that stops advancing stops the pings, and the service manager
// restarts the daemon.
func (d *Daemon) watchdog(ctx context.Context, every time.Duration) {
	t := time.NewTicker(every)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		if err := d.Healthy(); err != nil {
			d.log.Warn("not pinging the watchdog", "reason", err)
			continue
		}
		if err := d.opts.Notify(sd.SdNotifyWatchdog); err != nil {
			d.log.Warn("sd_notify WATCHDOG=1 failed", "error", err)
		}
	}
}

// busConnected reports whether the bus is connected now, and not stalled.
func (d *Daemon) busConnected() bool { return d.bus != nil && d.bus.Up() }

// minStall is the shortest time without a tick that counts as a stall, so
// that a fast estimator is not declared dead over a garbage-collection pause
// or a busy machine.
const minStall = time.Second

// stallLimit is how long an estimator of the given period may go without a
// tick before the daemon is unhealthy: three periods, at least minStall.
func stallLimit(period time.Duration) time.Duration { return max(3*period, minStall) }

// Healthy returns nil while the tick loop advances: every estimator has
// started a tick within stallLimit of its period (before its first tick,
// since the scheduler started). A bus outage does not make the daemon
// unhealthy: it keeps ticking, coasting, and a restart would not bring the
// bus back.
func (d *Daemon) Healthy() error {
	if d.started.Load() == 0 {
		return errors.New("not running")
	}
	sched := d.scheduled.Load()
	if sched == 0 {
		return nil // starting: the scheduler has not started yet
	}
	now := d.now()
	var errs []error
	for _, e := range d.all() {
		last := e.lastTick.Load()
		if last == 0 {
			last = sched
		}
		if age := time.Duration(now - last); age > stallLimit(e.period) {
			errs = append(errs, fmt.Errorf("estimator %s: no tick for %v (period %v)", e.name, age.Round(time.Millisecond), e.period))
		}
	}
	return errors.Join(errs...)
}

// lastTick is what /healthz judges: the oldest tick (oldestTick), or, in a
// fleet, whose estimators and periods come and go, now while Healthy and
// the zero time when not.
func (d *Daemon) lastTick() time.Time {
	if d.opts.Fleet == nil {
		return d.oldestTick()
	}
	if d.Healthy() != nil {
		return time.Time{}
	}
	return time.Now()
}

// oldestTick returns the start of the oldest of the estimators' latest
// ticks, counting the start of the scheduler for an estimator that has not
// ticked yet, and now while the daemon is starting: /healthz fails when it
// is older than stallLimit of the longest period.
func (d *Daemon) oldestTick() time.Time {
	sched := d.scheduled.Load()
	if sched == 0 {
		return time.Now()
	}
	all := d.all()
	if len(all) == 0 {
		return time.Now() // a fleet daemon with nothing to run yet
	}
	oldest := int64(0)
	for i, e := range all {
		last := e.lastTick.Load()
		if last == 0 {
			last = sched
		}
		if i == 0 || last < oldest {
			oldest = last
		}
	}
	return d.at(oldest)
}

// Ready returns nil when the daemon is ready for traffic — the bus is
// connected, and every estimator has valid gains and has ticked — and
// otherwise an error that lists what is missing.
func (d *Daemon) Ready() error {
	if m := d.missing(); len(m) > 0 {
		errs := make([]error, len(m))
		for i, s := range m {
			errs[i] = errors.New(s)
		}
		return errors.Join(errs...)
	}
	return nil
}

// missing lists what keeps the daemon from being ready, for /readyz.
func (d *Daemon) missing() []string {
	var m []string
	switch {
	case d.started.Load() == 0:
		m = append(m, "not running")
	case d.scheduled.Load() == 0:
		// Starting; the bus is only read once the scheduler has started
		// (set after it), so that this may run on any goroutine.
		m = append(m, "starting")
	case !d.busConnected():
		m = append(m, "bus not connected")
	case d.fleet != nil && !d.fleet.joined.Load():
		m = append(m, "fleet "+d.opts.Fleet.Name+": its buckets are not available yet")
	}
	if w := d.leases.waiting.Load(); w != nil {
		m = append(m, *w)
	}
	for _, e := range d.all() {
		if e.fleet == nil && d.scheduled.Load() != 0 && d.leases.waiting.Load() == nil && !e.mayPublish() {
			m = append(m, "estimator "+e.name+": its lease is not held")
		}
		if !e.gainsOK.Load() {
			m = append(m, "estimator "+e.name+": gains not valid")
		}
		if e.lastTick.Load() == 0 {
			m = append(m, "estimator "+e.name+": no tick yet")
		}
		if !e.sampled.Load() {
			m = append(m, "estimator "+e.name+": no sample received yet on its wired subjects (every tick so far ran without inputs or measurements)")
		}
		if e.diverged.Load() {
			m = append(m, "estimator "+e.name+": diverged (re-initialising)")
		}
	}
	return m
}
