package daemon

import (
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/config"
	"surmise/daemon/lease"
	"surmise/estimator"
)

// badSampleLogEvery is the default shortest interval between two log lines
// about refused samples of one signal of one estimator
// (Options.RefusedLogInterval); the refusals in between are counted and
// summarised when it is over.
const badSampleLogEvery = 10 * time.Second

// Estimator is one running estimator of a Daemon: the engine of one plant,
// the gains file it runs, its subscriptions, its metrics and what its ticks
// publish. The engine is safe for concurrent use (Engine.UseGains,
// SetCandidate and Reset take effect at the next tick), so a reload or a
// control request acts on it directly.
type Estimator struct {
	d       *Daemon
	name    string
	plant   *config.Plant
	subject string        // where its estimates go
	period  time.Duration // the plant's sample time
	engine  *Engine
	metrics *EstimatorMetrics
	signals []signal             // the engine's signals: inputs, then outputs
	subs    []*nats.Subscription // one per signal while subscribed (dispatch.go)
	fleet   *fleetLease          // its ownership in a fleet (fleet_run.go); nil outside one

	gains   atomic.Pointer[config.GainsFile]
	lease   atomic.Pointer[lease.Lease] // this estimator's, once taken or awaited
	gainsOK atomic.Bool

	lastTick atomic.Int64 // start of the latest tick (Daemon.now), 0 before the first
	// sampled is set by the first sample the engine accepts: until then
	// every tick runs on operating-point inputs without a measurement, and
	// the estimator is not ready.
	sampled  atomic.Bool
	diverged atomic.Bool // the latest tick's status is diverged

	// Touched by its ticks only (the ticks of one job never overlap).
	est       *Estimate
	payload   []byte
	numbers   NumberCache // the text of the payload's numbers, tick to tick
	lastReady int8        // the ready gauge as last set: -1 never, 0, 1

	comm   *Commissioner // reloads, shadow, promotion (reload.go)
	shadow shadowLane    // the candidate's estimate, tick only (shadow.go)
	timing TickTiming    // of the tick being run, tick only (Timing)
}

// signal is one wired signal of an estimator.
type signal struct {
	name, subject string
	index         int // the engine's index, also the metrics' signal index
	limit         logLimiter
}

func newEstimator(d *Daemon, spec PlantSpec, active *estimator.Prepared) *Estimator {
	plant := spec.Plant
	met := BindMetrics(d.metrics, plant, spec.Gains.Active)
	eng := NewEngine(plant, active, EngineOptions{Metrics: met})
	e := &Estimator{
		d:         d,
		name:      plant.Name,
		plant:     plant,
		subject:   EstimateSubject(plant),
		period:    periodOf(plant),
		engine:    eng,
		metrics:   met,
		est:       eng.NewEstimate(),
		lastReady: -1,
	}
	e.est.Instance = d.opts.Instance
	e.gains.Store(spec.Gains)
	e.gainsOK.Store(true)
	met.SetReady(false)
	for _, ws := range [][]config.Wire{plant.Inputs, plant.Outputs} {
		for _, w := range ws {
			i, ok := eng.SignalIndex(w.Subject)
			if !ok || i != len(e.signals) {
				// NewEngine indexes the inputs, then the outputs, by subject.
				panic(fmt.Sprintf("daemon: plant %s: signal %s on %q has engine index %d, want %d", plant.Name, w.Signal, w.Subject, i, len(e.signals)))
			}
			e.signals = append(e.signals, signal{name: w.Signal, subject: w.Subject, index: i})
		}
	}
	return e
}

// Name returns the estimator's name (the plant's).
func (e *Estimator) Name() string { return e.name }

// Plant returns the plant file the estimator runs.
func (e *Estimator) Plant() *config.Plant { return e.plant }

// Engine returns the estimator's engine. Its methods that change it
// (UseGains, SetCandidate, Reset) may be called at any time and take effect
// at the next tick; Tick and CandidateTo belong to the daemon.
func (e *Estimator) Engine() *Engine { return e.engine }

// Metrics returns the estimator's bound metric series.
func (e *Estimator) Metrics() *EstimatorMetrics { return e.metrics }

// Gains returns the gains file in use.
func (e *Estimator) Gains() *config.GainsFile { return e.gains.Load() }

// SetGains records the gains file in use, after the engine has been told to
// use its active set (Engine.UseGains), and whether the gains are valid;
// invalid gains make the daemon not ready. A nil g keeps the file.
func (e *Estimator) SetGains(g *config.GainsFile, valid bool) {
	if g != nil {
		e.gains.Store(g)
	}
	e.gainsOK.Store(valid)
}

// Subject returns the subject its estimates are published on.
func (e *Estimator) Subject() string { return e.subject }

// Period returns its tick period, the plant's sample time.
func (e *Estimator) Period() time.Duration { return e.period }

// receive decodes one payload of signal s and offers it to the engine, which
// counts it; a payload that does not decode is counted here.
func (e *Estimator) receive(s *signal, data []byte) {
	recv := time.Now()
	v, at, err := DecodeSample(data, recv)
	if err != nil {
		r := ReasonOf(err)
		e.metrics.SampleReceived(s.index)
		e.metrics.SampleRejected(s.index, r)
		e.logRefused(s, r, err)
		return
	}
	if r, ok := e.engine.Offer(s.index, v, at, recv); !ok {
		e.logRefused(s, r, nil)
	} else if !e.sampled.Load() {
		e.sampled.Store(true)
	}
}

// logRefused logs a refused sample, at most once per
// Options.RefusedLogInterval for each signal; the refusals in between are
// summarised by logHeldRefusals.
func (e *Estimator) logRefused(s *signal, r Reason, err error) {
	every := e.d.opts.RefusedLogInterval
	ok, held := s.limit.allow(e.d.now(), int64(every), r)
	if !ok {
		return
	}
	args := []any{"estimator", e.name, "signal", s.name, "subject", s.subject, "reason", r.String()}
	if err != nil {
		args = append(args, "error", err)
	}
	if held > 0 {
		args = append(args, "refused_before", held)
	}
	e.d.log.Warn("sample refused", args...)
}

// logHeldRefusals logs, for each signal whose refusals were held back and
// whose interval is over, one line with how many there were and the latest
// reason; so a burst of refusals is reported even when none follows it. It
// runs after each tick and allocates nothing when there is nothing to log.
func (e *Estimator) logHeldRefusals() {
	every := e.d.opts.RefusedLogInterval
	now := e.d.now()
	for i := range e.signals {
		s := &e.signals[i]
		held, r := s.limit.due(now, int64(every))
		if held == 0 {
			continue
		}
		e.d.log.Warn("samples refused", "estimator", e.name, "signal", s.name, "subject", s.subject,
			"count", held, "within", every.String(), "latest_reason", r.String())
	}
}

// tick runs one tick: the engine's estimate, its publication when the bus
// is connected, the tick's metrics, the in-process listeners. It allocates
// nothing when no listener allocates (the NATS client's Publish copies the
// payload into its buffer).
func (e *Estimator) tick(t Tick) {
	d := e.d
	e.engine.Tick(t.Due, e.est)
	e.payload = e.est.AppendJSONWith(e.payload[:0], &e.numbers)
	var ours bool
	if e.fleet != nil {
		ours = e.fleetTick() // every tick: it also checkpoints
	} else {
		ours = e.mayPublish()
	}
	connected := d.busConnected() && ours
	if connected {
		// With the reconnect buffer off, Publish fails rather than queue
		// when the connection dropped since IsConnected: nothing stale is
		// sent later.
		if err := d.bus.Conn().Publish(e.subject, e.payload); err == nil {
			e.observeLatency(time.Now())
		} else if errors.Is(err, nats.ErrMaxPayload) {
			d.metrics.BusDropped(DropOversize, 1)
		}
	}
	e.afterTick(connected)
	e.logHeldRefusals()
	e.timing = TickTiming{Lateness: t.Lateness, Compute: time.Since(t.Start), Missed: t.Missed}
	e.metrics.ObserveTick(e.est.Status, e.timing.Lateness, e.timing.Compute, e.timing.Missed)
	e.lastTick.Store(d.now())
	diverged := e.est.Status == StatusDiverged
	e.diverged.Store(diverged)
	ready := connected && e.gainsOK.Load() && e.sampled.Load() && !diverged
	if r := b2i(ready); r != e.lastReady {
		e.metrics.SetReady(ready)
		e.lastReady = r
	}
	if ls := d.listeners.Load(); ls != nil {
		for _, l := range *ls {
			l.fn(e, e.est, e.payload)
		}
	}
}

// Timing returns the lateness, compute time and missed ticks of the tick
// whose estimate is being handed to the listeners; call it from an
// EstimateFunc (the tick's goroutine).
func (e *Estimator) Timing() TickTiming { return e.timing }

// observeLatency records, for every measurement the estimate was corrected
// with, the time from its receipt to now, the publication of the estimate.
// Each sample is used by one tick at most, so that estimate is the first
// that used it.
func (e *Estimator) observeLatency(now time.Time) {
	for j := range e.est.Outputs {
		if o := &e.est.Outputs[j]; o.Used && !o.Received.IsZero() {
			e.metrics.ObserveSampleToEstimate(now.Sub(o.Received))
		}
	}
}

func b2i(b bool) int8 {
	if b {
		return 1
	}
	return 0
}

// logLimiter lets one event through per interval and counts the others.
type logLimiter struct {
	next   atomic.Int64
	held   atomic.Int64
	reason atomic.Uint32 // the latest held event's Reason
}

// allow reports whether an event at now (nanoseconds on a monotonic scale)
// may be logged, and how many were held back since the last one that was
// (none, when due reported them in between).
func (l *logLimiter) allow(now, every int64, r Reason) (ok bool, held int64) {
	next := l.next.Load()
	if now < next || !l.next.CompareAndSwap(next, now+every) {
		l.reason.Store(uint32(r))
		l.held.Add(1)
		return false, 0
	}
	return true, l.held.Swap(0)
}

// due returns how many events were held back, and the latest one's reason,
// when there are some and the interval that held them is over; it then
// starts a new interval. Otherwise it returns 0.
func (l *logLimiter) due(now, every int64) (held int64, r Reason) {
	if l.held.Load() == 0 {
		return 0, 0
	}
	next := l.next.Load()
	if now < next || !l.next.CompareAndSwap(next, now+every) {
		return 0, 0
	}
	return l.held.Swap(0), Reason(l.reason.Load())
}

// EstimateFunc receives the estimates of every estimator of a daemon, on the
// goroutine of the tick, right after the estimate was published (or not, when
// the bus is down). est and payload, its JSON as published, belong to the
// estimator and are valid only during the call: copy what you keep. It must
// return quickly; a slow listener delays the ticks that share its worker.
type EstimateFunc func(e *Estimator, est *Estimate, payload []byte)

type listener struct{ fn EstimateFunc }

// OnEstimate adds fn to the listeners of every tick's estimate and returns
// the function that removes it, which may be called more than once. A tick
// with no listener costs one atomic load and allocates nothing.
func (d *Daemon) OnEstimate(fn EstimateFunc) (remove func()) {
	l := &listener{fn: fn}
	d.listenMu.Lock()
	var next []*listener
	if cur := d.listeners.Load(); cur != nil {
		next = append(next, *cur...)
	}
	next = append(next, l)
	d.listeners.Store(&next)
	d.listenMu.Unlock()
	var once sync.Once
	return func() {
		once.Do(func() {
			d.listenMu.Lock()
			defer d.listenMu.Unlock()
			var rest []*listener
			for _, x := range *d.listeners.Load() {
				if x != l {
					rest = append(rest, x)
				}
			}
			if len(rest) == 0 {
				d.listeners.Store(nil)
			} else {
				d.listeners.Store(&rest)
			}
		})
	}
}
