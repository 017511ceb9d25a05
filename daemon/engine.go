package daemon

import (
	"fmt"
	"math"
	"sync"
	"sync/atomic"
	"time"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/estimator"
)

// BandProbability is the probability of the two-sided chi-square band that
// the windowed mean NIS must stay inside; outside it the status is suspect.
const BandProbability = 0.95

// EngineOptions are the optional parts of an engine. The zero value is an
// engine with no shadow lane, no metrics and the plant's window.
type EngineOptions struct {
	// Candidate, when not nil, runs a shadow lane on the same samples as the
	// active gains; read it with CandidateTo after each Tick.
	Candidate *estimator.Prepared
	// Metrics, when not nil, are the estimator's series, bound with
	// BindMetrics for the plant and the active set's name. Offer counts
	// samples received and rejected; Tick sets the measurement ages and,
	// per gain set, the states, innovations, outliers and NIS. The caller,
	// which has the clock, records each tick with ObserveTick(est.Status,
	// lateness, compute time, missed) and the sample-to-estimate latency
	// from OutputEstimate.Received.
	Metrics *EstimatorMetrics
	// Window is the length, in ticks, of the NIS window and of the
	// innovation RMS window. Zero means the plant's Window, and then
	// config.DefaultWindow.
	Window int
}

// DivergedHold is the number of ticks a diverged lane stays diverged before
// the engine re-initialises it from the plant's initial state and
// covariance: long enough for every scrape, dashboard and /readyz probe to
// see the status, short enough that the estimator is back on its own within
// seconds at the usual tick rates.
const DivergedHold = 10

// pendingDepth is how many samples per signal wait for their tick. Newest
// wins within one tick, so more than one is only needed when samples arrive
// out of order or ahead of the tick they belong to.
const pendingDepth = 4

// sample is one accepted reading. at is its sample time, never later than
// recv, its receive time.
type sample struct {
	value    float64
	at, recv time.Time
}

// slot holds one signal's samples between Offer and Tick; guarded by
// Engine.mu.
type slot struct {
	pend [pendingDepth]sample
	n    int
	// cur is the newest sample taken by a tick: for an input the held
	// value, for an output the last one used or judged stale.
	cur sample
	has bool
}

// taken is what a tick took from a slot: the slot's cur and has, and fresh
// when an output's sample was taken by this tick.
type taken struct {
	cur        sample
	has, fresh bool
}

// push adds s, dropping the oldest pending sample when the slot is full.
func (sl *slot) push(s sample) {
	if sl.n < pendingDepth {
		sl.pend[sl.n] = s
		sl.n++
		return
	}
	old := 0
	for i := 1; i < sl.n; i++ {
		if sl.pend[i].at.Before(sl.pend[old].at) {
			old = i
		}
	}
	if s.at.After(sl.pend[old].at) {
		sl.pend[old] = s
	}
}

// take moves the newest pending sample with at ≤ t into cur (if it is newer
// than cur) and drops every other pending sample with at ≤ t; samples after t
// stay for a later tick. It reports whether a sample was taken.
func (sl *slot) take(t time.Time) bool {
	var best sample
	found := false
	k := 0
	for i := 0; i < sl.n; i++ {
		s := sl.pend[i]
		if s.at.After(t) {
			sl.pend[k] = s
			k++
			continue
		}
		if !found || s.at.After(best.at) {
			best, found = s, true
		}
	}
	sl.n = k
	if !found || (sl.has && best.at.Before(sl.cur.at)) {
		return false
	}
	sl.cur, sl.has = best, true
	return true
}

// wire is the engine's copy of one signal's wiring.
type wire struct {
	name, unit, subject string
	maxAge              time.Duration // 0: no limit (config always sets one)
	maxDelay            time.Duration // delay horizon of a late sample (late.go)
	min, max            float64
	hasRange            bool
}

// Engine turns samples into estimates, one per tick (see Tick). It is
// pure and deterministic: it starts no goroutines and reads no clock; the
// time of every sample and tick is passed in, so a live run and a replay of
// the same samples at the same tick times give the same estimates.
//
// Offer, SignalIndex, UseGains, SetCandidate and Reset may be called from any
// goroutine, concurrently with Tick. Tick and CandidateTo must be called from
// one goroutine at a time (the tick loop), with strictly increasing times.
type Engine struct {
	name   string
	model  *estimator.Model
	n, m   int
	p      int
	wires  []wire             // inputs then outputs
	states []estimator.Signal // names (x1, x2, … where the model has none) and units
	ranges []config.Range     // of the states; HasRange false where the plant gives none
	bySubj map[string]int
	window int
	met    *EstimatorMetrics

	mu       sync.Mutex
	slots    []slot       // guarded by mu
	lastTick time.Time    // guarded by mu: time of the last Tick
	ticked   bool         // guarded by mu
	lateQ    []lateSample // guarded by mu: samples of ticks that have run, for the next tick to place
	lateQN   int          // guarded by mu

	// Changes requested between ticks, applied at the start of the next.
	nextActive atomic.Pointer[estimator.Prepared]
	nextCand   atomic.Pointer[candidateChange]
	resetReq   atomic.Bool
	ops        laneOps // the commissioning path's ordered changes (shadow.go)

	// Owned by the tick goroutine.
	seq         uint64
	snap        []taken // what this tick took from the slots, under mu
	u, y        []float64
	inStale     []bool
	present     estimator.Pattern
	fresh       estimator.Pattern // outputs with a sample taken this tick (used or stale)
	stale       bool              // an input is stale this tick
	now         time.Time
	fingerprint string        // of the plant's model: every gain set it runs was designed for it
	x0          []float64     // initial state, absolute; nil means the operating point
	p0          mat.Symmetric // initial covariance
	active      *lane
	cand        *lane
	bands       [bandCacheSize]bandEntry // tick goroutine only

	// Late samples (late.go), tick goroutine only: the ring of past ticks,
	// the first tick a re-run may start from, and the late samples taken
	// from lateQ for this tick.
	past    []pastTick
	floor   uint64
	lateBuf []lateSample
	lateN   int
	// per signal, this tick: late samples fused at their own tick, and
	// refused as late (beyond max_delay)
	lateFused, lateRefused []int
}

// candidateChange is a request to replace (prep != nil) or remove the
// candidate lane.
type candidateChange struct{ prep *estimator.Prepared }

// NewEngine returns an engine for one plant, running the active gains.
// It panics if the plant's wiring does not match its model (a plant that has
// not been through config validation) or active is nil.
func NewEngine(plant *config.Plant, active *estimator.Prepared, opts EngineOptions) *Engine {
	if plant == nil || plant.Model == nil || active == nil {
		panic("daemon: NewEngine needs a plant with a model and active gains")
	}
	md := plant.Model
	n, m, p := md.Dims()
	if len(plant.Inputs) != m || len(plant.Outputs) != p {
		panic(fmt.Sprintf("daemon: plant %q wires %d inputs and %d outputs, its model has %d and %d",
			plant.Name, len(plant.Inputs), len(plant.Outputs), m, p))
	}
	win := opts.Window
	if win <= 0 {
		win = plant.Window
	}
	if win <= 0 {
		win = config.DefaultWindow
	}
	e := &Engine{
		name:    plant.Name,
		model:   md,
		n:       n,
		m:       m,
		p:       p,
		wires:   make([]wire, 0, m+p),
		bySubj:  make(map[string]int, m+p),
		window:  win,
		met:     opts.Metrics,
		slots:   make([]slot, m+p),
		snap:    make([]taken, m+p),
		u:       make([]float64, m),
		y:       make([]float64, p),
		inStale: make([]bool, m),
	}
	for _, ws := range [][]config.Wire{plant.Inputs, plant.Outputs} {
		for _, w := range ws {
			i := len(e.wires)
			e.wires = append(e.wires, wire{
				name: w.Signal, unit: w.Unit, subject: w.Subject, maxAge: w.MaxAge, maxDelay: w.MaxDelay,
				min: w.Min, max: w.Max, hasRange: w.HasRange,
			})
			if w.Subject == "" {
				continue
			}
			if j, dup := e.bySubj[w.Subject]; dup {
				panic(fmt.Sprintf("daemon: plant %q wires %q and %q to the same subject %q",
					plant.Name, e.wires[j].name, w.Signal, w.Subject))
			}
			e.bySubj[w.Subject] = i
		}
	}
	e.states = make([]estimator.Signal, n)
	for i := range e.states {
		e.states[i] = estimator.Signal{Name: signalName(md.States, i, "x")}
		if i < len(md.States) {
			e.states[i].Unit = md.States[i].Unit
		}
	}
	e.ranges = make([]config.Range, n)
	copy(e.ranges, plant.StateRanges)
	e.x0 = plant.Initial
	if plant.InitialCov != nil {
		e.p0 = plant.InitialCov
	}
	e.fingerprint = config.Fingerprint(md)
	var horizon time.Duration
	for _, w := range e.wires {
		horizon = max(horizon, w.maxDelay)
	}
	e.past = make([]pastTick, horizonTicks(horizon, md.Ts)+2)
	for i := range e.past {
		e.past[i] = pastTick{u: make([]float64, m), y: make([]float64, p),
			uAt: make([]time.Time, m), yAt: make([]time.Time, p)}
	}
	e.floor = 1
	e.lateQ = make([]lateSample, 4*(m+p)+16)
	e.lateBuf = make([]lateSample, len(e.lateQ))
	e.lateFused, e.lateRefused = make([]int, m+p), make([]int, m+p)
	e.active = e.newLane(active)
	if e.met != nil {
		// BindMetrics bound the active set's series already.
		e.active.gm, e.active.gmName = e.met.Primary(), e.active.gainsName
	}
	if opts.Candidate != nil {
		e.cand = e.newLane(opts.Candidate)
	}
	e.rebind()
	return e
}

// Name returns the estimator's name (the plant's).
func (e *Engine) Name() string { return e.name }

// Signals returns the number of signals: the inputs, then the outputs.
func (e *Engine) Signals() int { return len(e.wires) }

// SignalName returns the name of signal i as written in the plant file.
func (e *Engine) SignalName(i int) string { return e.wires[i].name }

// SignalIndex returns the index of the signal wired to subject, for Offer.
func (e *Engine) SignalIndex(subject string) (int, bool) {
	i, ok := e.bySubj[subject]
	return i, ok
}

// Offer hands the engine one sample of signal (an index from SignalIndex:
// inputs 0…m−1, then outputs). sampleTime is the sample's own time (the zero
// time means recvTime); recvTime is when it was received.
//
// Clock skew: a sample time after the receive time comes from a sender whose
// clock runs ahead of ours. It is clamped to the receive time — a sample
// cannot have been taken after it arrived — so the sample belongs to the
// first tick at or after its receipt, and its age is counted from then.
//
// It reports ok when the sample was accepted, else why it was refused:
// ReasonNaN (NaN or ±Inf), ReasonRange (outside the signal's valid range),
// ReasonLate (an output sample whose time is not after the last tick, when
// the queue of such samples is full) or ReasonUnknown (no such signal).
//
// A sample whose time is not after the last tick belongs to a tick that has
// already run: it is queued for the next tick, which fuses it at its own
// time by re-running from there (late.go) while that tick lies within the
// signal's max_delay, and otherwise refuses it as late and counts it then.
// An input sample also goes on to be held from the next tick on.
// Refused samples are counted and never used; a sample accepted now can
// still be counted stale by the tick that takes it. Offer allocates nothing
// and may be called from any goroutine.
func (e *Engine) Offer(signal int, value float64, sampleTime, recvTime time.Time) (r Reason, ok bool) {
	if signal < 0 || signal >= len(e.wires) {
		return ReasonUnknown, false
	}
	e.countReceived(signal)
	w := &e.wires[signal]
	switch {
	case math.IsNaN(value) || math.IsInf(value, 0):
		e.countRejected(signal, ReasonNaN)
		return ReasonNaN, false
	case w.hasRange && (value < w.min || value > w.max):
		e.countRejected(signal, ReasonRange)
		return ReasonRange, false
	}
	if sampleTime.IsZero() || sampleTime.After(recvTime) {
		sampleTime = recvTime
	}
	if signal < e.m && w.maxAge > 0 && recvTime.Sub(sampleTime) > w.maxAge {
		// An input too old on arrival to be used (it would make every
		// tick stale-input); an output that old is counted stale at its
		// tick.
		e.countRejected(signal, ReasonStale)
		return ReasonStale, false
	}
	smp := sample{value: value, at: sampleTime, recv: recvTime}
	e.mu.Lock()
	if e.ticked && !sampleTime.After(e.lastTick) {
		// Its tick has run: the next tick places it (late.go).
		queued := e.lateQN < len(e.lateQ)
		if queued {
			e.lateQ[e.lateQN] = lateSample{signal: signal, sample: smp}
			e.lateQN++
		}
		if signal >= e.m {
			e.mu.Unlock()
			if !queued {
				e.countRejected(signal, ReasonLate)
				return ReasonLate, false
			}
			return 0, true
		}
	}
	e.slots[signal].push(smp)
	e.mu.Unlock()
	return 0, true
}

// UseGains replaces the active gains from the next tick on; the state and
// its covariance carry over (estimator.Filter.Use), the NIS and RMS windows
// start again. p must be prepared for the plant's model (Filter.Use panics
// otherwise). It may be called from any goroutine; a tick in progress
// finishes with the gains it started with.
func (e *Engine) UseGains(p *estimator.Prepared) {
	if p == nil {
		panic("daemon: UseGains(nil)")
	}
	e.nextActive.Store(p)
}

// SetCandidate starts a shadow lane running p from the next tick on; nil
// removes the shadow lane. The lane starts like a new filter, from the
// plant's initial state and covariance (estimator.Filter offers no way to
// copy the active lane's state, prediction-form correction and covariance),
// so compare it with the active lane once it has converged. p must be
// prepared for the plant's model. It may be called from any goroutine.
func (e *Engine) SetCandidate(p *estimator.Prepared) {
	e.nextCand.Store(&candidateChange{prep: p})
}

// Reset puts the state of every lane back to the plant's initial state and
// empties the NIS windows at the start of the next tick.
func (e *Engine) Reset() { e.resetReq.Store(true) }

// applyChanges applies, between ticks, what UseGains, SetCandidate and Reset
// asked for.
func (e *Engine) applyChanges() {
	if e.ops.pending.Load() || e.nextActive.Load() != nil || e.nextCand.Load() != nil || e.resetReq.Load() {
		// A re-run never crosses a change of the lanes (late.go).
		e.floor = e.seq + 1
	}
	e.applyOps()
	if p := e.nextActive.Swap(nil); p != nil {
		e.active.use(p)
		e.rebind()
	}
	if c := e.nextCand.Swap(nil); c != nil {
		old := e.cand
		e.cand = nil
		if c.prep != nil {
			e.cand = e.newLane(c.prep)
		}
		e.rebind(old)
	}
	if e.resetReq.Swap(false) {
		for _, l := range []*lane{e.active, e.cand} {
			if l != nil {
				l.reset(e.x0, e.p0)
			}
		}
	}
}

// Tick runs tick t — the due time given by the scheduler, or replay's virtual
// clock — and writes its estimate to dst:
//
//  1. Inputs: the newest sample with time ≤ t is held. An input whose held
//     sample is older than its max_age at t, or that was never received
//     (then the operating point is held), makes the status stale-input; the
//     held value is used all the same.
//  2. Outputs: the newest sample with a time in (previous tick, t] — at the
//     first tick, any time up to t — if it is within max_age of t; older ones
//     in that interval are superseded, one that has aged past max_age is
//     counted stale, and each sample is used at most once: an output without
//     a new sample is missing from this tick. (Samples dated at or before
//     the previous tick were refused as late by Offer.)
//  3. Every lane (active, and the candidate if any) steps its filter on the
//     same snapshot: predict with the inputs held at the previous tick,
//     correct with the outputs present.
//  4. Status, the most serious that holds, in this order of precedence:
//     stale-input (step 1), suspect (a full window's mean NIS outside its
//     95 % band, the NIS of outputs the gate refused counted at the gate's
//     threshold; it stays while the window holds the evidence, even on
//     ticks that only predict; or the gate has refused every present output
//     on estimator.GateSuspect ticks in a row), coasting (nothing corrected: no fresh
//     measurement, all rejected by the gate, or no fixed gain for the
//     pattern), tracking.
//  5. dst gets the estimate; with metrics attached, the series listed at
//     EngineOptions.Metrics are updated.
//
// Times must increase from tick to tick.
//
// dst is reused: with slices from NewEstimate (or a previous Tick) a Tick
// allocates nothing. Swaps asked for with UseGains, SetCandidate and Reset
// take effect at the start of a Tick, never during one.
func (e *Engine) Tick(t time.Time, dst *Estimate) {
	e.applyChanges()
	e.seq++
	e.now = t

	e.mu.Lock()
	for i := range e.slots {
		sl := &e.slots[i]
		fresh := sl.take(t) && i >= e.m
		e.snap[i] = taken{cur: sl.cur, has: sl.has, fresh: fresh}
	}
	e.lastTick, e.ticked = t, true
	e.lateN = copy(e.lateBuf, e.lateQ[:e.lateQN])
	e.lateQN = 0
	e.mu.Unlock()

	// 1. Inputs, zero-order hold.
	e.stale = false
	for i := 0; i < e.m; i++ {
		s := &e.snap[i]
		w := &e.wires[i]
		if s.has {
			e.u[i] = s.cur.value
		} else {
			e.u[i] = at(e.model.U0, i)
		}
		e.inStale[i] = !s.has || (w.maxAge > 0 && t.Sub(s.cur.at) > w.maxAge)
		e.stale = e.stale || e.inStale[i]
	}
	// 2. Outputs: fresh and young enough.
	e.present, e.fresh = 0, 0
	for j := 0; j < e.p; j++ {
		i := e.m + j
		s := &e.snap[i]
		w := &e.wires[i]
		e.y[j] = math.NaN()
		if !s.fresh {
			continue
		}
		e.fresh |= 1 << uint(j)
		if w.maxAge > 0 && t.Sub(s.cur.at) > w.maxAge {
			e.countRejected(i, ReasonStale)
			continue
		}
		e.y[j] = s.cur.value
		e.present |= 1 << uint(j)
	}
	// Late samples into their ticks, and the re-run from the earliest.
	rerun := e.placeLate(t)
	if rerun != 0 {
		e.rerun(rerun)
	}
	e.record()
	// 3. Step every lane on the same snapshot.
	for _, l := range []*lane{e.active, e.cand} {
		if l == nil {
			continue
		}
		l.tick(e, rerun != 0)
		if l.reinit || l.held == 1 {
			// A re-run never crosses a divergence (late.go).
			e.floor = e.seq + 1
		}
	}
	// 4 and 5.
	e.fill(e.active, dst)
	e.observe(e.active, true)
	if e.cand != nil {
		e.observe(e.cand, false)
	}
}

// CandidateTo writes the candidate lane's estimate of the last tick to dst
// and reports whether there is a candidate lane. Call it after Tick, from the
// same goroutine.
func (e *Engine) CandidateTo(dst *Estimate) bool {
	if e.cand == nil {
		return false
	}
	e.fill(e.cand, dst)
	return true
}

// NewEstimate returns an Estimate whose slices fit this engine, so that Tick
// and CandidateTo never allocate.
func (e *Engine) NewEstimate() *Estimate {
	return &Estimate{
		Estimator: e.name,
		States:    make([]StateEstimate, e.n),
		Inputs:    make([]InputValue, e.m),
		Outputs:   make([]OutputEstimate, e.p),
	}
}

// fill writes lane l's view of the last tick to dst.
func (e *Engine) fill(l *lane, dst *Estimate) {
	dst.Estimator = e.name
	dst.Time = e.now
	dst.Seq = e.seq
	dst.Status = l.status
	dst.Gains = l.gainsName
	dst.Fingerprint = e.fingerprint
	dst.Form = l.form
	dst.NIS, dst.Dof = math.NaN(), 0
	if l.out.HasNIS {
		dst.NIS, dst.Dof = l.out.NIS, l.out.Dof
	}
	dst.NISMean = l.mean
	dst.NISBand[0], dst.NISBand[1] = l.lo, l.hi
	dst.Used, dst.Outliers, dst.NoGain = 0, l.out.Outliers, l.out.NoGain
	if l.out.Corrected {
		dst.Used = l.out.Used
	}

	dst.Diverged, dst.Reinitialised = l.why, l.reinit
	numbers := l.status != StatusDiverged
	if !numbers {
		dst.NIS, dst.Dof, dst.NISMean = math.NaN(), 0, math.NaN()
	}
	dst.States = resize(dst.States, e.n)
	for i := range dst.States {
		s := &dst.States[i]
		s.Name, s.Unit = e.states[i].Name, e.states[i].Unit
		s.Value, s.Std = math.NaN(), math.NaN()
		if numbers {
			s.Value = l.x[i]
			if l.hasStd {
				s.Std = l.std[i]
			}
		}
	}
	dst.Inputs = resize(dst.Inputs, e.m)
	for i := range dst.Inputs {
		in := &dst.Inputs[i]
		in.Name, in.Unit = e.wires[i].name, e.wires[i].unit
		in.Value = e.u[i]
		in.Stale = e.inStale[i]
		in.Late, in.TooLate = e.lateFused[i], e.lateRefused[i]
		in.Age = math.NaN()
		if e.snap[i].has {
			in.Age = e.now.Sub(e.snap[i].cur.at).Seconds()
		}
	}
	dst.Outputs = resize(dst.Outputs, e.p)
	for j := range dst.Outputs {
		i := e.m + j
		o := &dst.Outputs[j]
		o.Name, o.Unit = e.wires[i].name, e.wires[i].unit
		o.Measured = e.y[j]
		o.Predicted = l.yhat[j]
		o.Innovation, o.InnovationStd = math.NaN(), math.NaN()
		if !numbers {
			o.Predicted = math.NaN()
		} else if e.present.Has(j) {
			// The filter reports the innovations it kept; an outlier's is
			// worth seeing too.
			o.Innovation = l.r[j]
			if math.IsNaN(o.Innovation) {
				o.Innovation = e.y[j] - l.yhat[j]
			}
			if v := l.s[j]; v >= 0 {
				o.InnovationStd = math.Sqrt(v)
			}
		}
		o.Late, o.TooLate = e.lateFused[i], e.lateRefused[i]
		o.Used = dst.Used.Has(j)
		o.Outlier = l.out.Outliers.Has(j)
		ws := l.watch.State(j)
		o.Bias, o.CUSUM = ws.Bias, max(ws.CUSUMHigh, ws.CUSUMLow)
		o.Stuck, o.LockedOut, o.Dropout = ws.Stuck, ws.LockedOut, ws.Dropout
		o.Stale = e.fresh.Has(j) && !e.present.Has(j)
		o.Age = math.NaN()
		o.Received = time.Time{}
		if e.snap[i].has {
			o.Age = e.now.Sub(e.snap[i].cur.at).Seconds()
			if e.snap[i].fresh {
				o.Received = e.snap[i].cur.recv
			}
		}
	}
}

// at returns v[i], or zero for a nil v (an operating point left at zero).
func at(v []float64, i int) float64 {
	if v == nil {
		return 0
	}
	return v[i]
}

// resize returns s with length n, reallocated only when too short.
func resize[T any](s []T, n int) []T {
	if cap(s) < n {
		return make([]T, n)
	}
	return s[:n]
}

// signalName returns the name of signal i, or prefix and i+1 when the model
// has none.
func signalName(s []estimator.Signal, i int, prefix string) string {
	if i < len(s) && s[i].Name != "" {
		return s[i].Name
	}
	return fmt.Sprintf("%s%d", prefix, i+1)
}

// bandCacheSize is the number of chi-square bands an engine remembers.
const bandCacheSize = 256

// bandEntry is one remembered band of a full NIS window: the band depends
// only on the summed degrees of freedom df of its values.
type bandEntry struct {
	df     int // 0: empty
	lo, hi float64
}

// band returns the 95 % band of the window's mean NIS. The band of a full
// window is remembered by its summed dof in a small direct-mapped cache, so
// that in steady state — even with the pattern of outputs changing from tick
// to tick, which changes the summed dof — no chi-square quantile is computed
// (they take microseconds, and gonum's allocates).
func (e *Engine) band(w *estimator.NISWindow) (lo, hi float64) {
	df := w.Dof()
	if w.Len() < e.window || df == 0 {
		return w.Band(BandProbability)
	}
	b := &e.bands[df%bandCacheSize]
	if b.df != df {
		b.lo, b.hi = w.Band(BandProbability)
		b.df = df
	}
	return b.lo, b.hi
}

// rmsWindow is the root mean square of the last n innovations of one output.
type rmsWindow struct {
	sq      []float64
	head, k int
}

func newRMSWindow(n int) rmsWindow { return rmsWindow{sq: make([]float64, n)} }

func (w *rmsWindow) add(r float64) {
	w.sq[w.head] = r * r
	w.head++
	if w.head == len(w.sq) {
		w.head = 0
	}
	if w.k < len(w.sq) {
		w.k++
	}
}

func (w *rmsWindow) reset() { w.head, w.k = 0, 0 }

// value returns the RMS, NaN when empty.
func (w *rmsWindow) value() float64 {
	if w.k == 0 {
		return math.NaN()
	}
	s := 0.0
	for _, v := range w.sq[:w.k] {
		s += v
	}
	return math.Sqrt(s / float64(w.k))
}

// BindMetrics binds the series of the plant's estimator in m, with its
// signals, outputs and states in the order the engine uses, for
// EngineOptions.Metrics. gains is the name of the active gain set.
func BindMetrics(m *Metrics, plant *config.Plant, gains string) *EstimatorMetrics {
	var outputs, states, signals []string
	for _, w := range plant.Inputs {
		signals = append(signals, w.Signal)
	}
	for _, w := range plant.Outputs {
		signals = append(signals, w.Signal)
		outputs = append(outputs, w.Signal)
	}
	n, _, _ := plant.Model.Dims()
	for i := 0; i < n; i++ {
		states = append(states, signalName(plant.Model.States, i, "x"))
	}
	return m.Estimator(plant.Name, outputs, states, signals, gains)
}

// countReceived counts a sample of signal i received.
func (e *Engine) countReceived(i int) {
	if e.met != nil {
		e.met.SampleReceived(i)
	}
}

// countRejected counts a sample of signal i rejected for reason r.
func (e *Engine) countRejected(i int, r Reason) {
	if e.met != nil {
		e.met.SampleRejected(i, r)
	}
}

// rebind gives each lane the series of its gain set's name, after a lane
// started, stopped or changed sets. When both lanes run sets of the same
// name only the active lane reports. Series already bound under the wanted
// name are kept; series no lane wants any more are removed; new ones are
// bound (which allocates). It runs at construction and between ticks.
func (e *Engine) rebind(old ...*lane) {
	if e.met == nil {
		return
	}
	// Every series currently bound, by name.
	have := make(map[string]*GainsMetrics, 3)
	for _, l := range append(old, e.active, e.cand) {
		if l != nil && l.gm != nil {
			have[l.gmName] = l.gm
			l.gm, l.gmName = nil, ""
		}
	}
	for _, l := range []*lane{e.active, e.cand} {
		if l == nil || (l == e.cand && l.gainsName == e.active.gainsName) {
			continue
		}
		g, ok := have[l.gainsName]
		if ok {
			delete(have, l.gainsName)
		} else {
			g = e.met.Gains(l.gainsName)
		}
		l.gm, l.gmName = g, l.gainsName
		g.SetInfo(l.form, e.fingerprint)
	}
	for _, g := range have {
		g.Remove()
	}
}

// observe updates the series of one lane after a tick, and for the active
// lane the per-estimator series. It allocates nothing.
func (e *Engine) observe(l *lane, active bool) {
	if e.met == nil {
		return
	}
	if active {
		for j := 0; j < e.p; j++ {
			if s := &e.snap[e.m+j]; s.has {
				e.met.SetMeasurementAge(j, e.now.Sub(s.cur.at))
			}
		}
	}
	g := l.gm
	if g == nil || l.status == StatusDiverged {
		return
	}
	if l.hasStd {
		g.SetStates(l.x, l.std)
	} else {
		g.SetStates(l.x, nil)
	}
	for j := 0; j < e.p; j++ {
		if r := l.r[j]; !math.IsNaN(r) {
			g.SetInnovation(j, r, l.rms[j].value())
		}
		if l.out.Outliers.Has(j) {
			g.Outlier(j)
		}
		g.SetSensor(j, l.watch.State(j))
	}
	g.SetNIS(l.lastNIS, l.mean, l.outOfBand)
	g.SetNISBand(l.lo, l.hi)
}
