package daemon

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// lane is one filter running one gain set on the engine's samples, with its
// consistency windows.
type lane struct {
	prep               *estimator.Prepared
	f                  *estimator.Filter
	gainsName          string
	form               string
	out                estimator.Outcome
	win                *estimator.NISWindow
	rms                []rmsWindow
	x, std, yhat, r, s []float64
	hasStd             bool
	mean, lo, hi       float64 // windowed mean NIS and its band
	status             Status
	outOfBand          bool
	gm                 *GainsMetrics // nil without metrics, or sharing another lane's name
	gmName             string        // the gains label of gm
	lastNIS            float64       // NIS of the last tick that had one
	watch              *estimator.SensorWatch
	// divergence: held counts the ticks since the lane diverged (0: it has
	// not); why says what diverged; reinit is true on the tick the lane was
	// re-initialised.
	held   int
	why    string
	reinit bool

	// For re-runs (late.go): states[seq % len] is the filter before the
	// step of tick seq; hist[seq % len] what that tick gave the windows, and
	// histR its innovations (p per entry). The windows hold contributions of
	// ticks from winFrom on (they were emptied before it); emptied is set
	// when they are emptied between ticks, until the next tick sets winFrom.
	states  []*estimator.FilterState
	hist    []contribution
	histR   []float64
	winFrom uint64
	emptied bool
	// lateFused is true when this tick's re-run corrected the tick its late
	// sample belongs to: the estimate has used a measurement since the
	// previous tick, so the tick is not coasting even when its own step
	// only predicted.
	lateFused bool
}

// contribution is what one tick gave a lane's windows.
type contribution struct {
	seq  uint64
	nis  float64 // estimator.Outcome.GateNIS
	dof  int     // 0: nothing for the NIS window
	used estimator.Pattern
}

func (e *Engine) newLane(p *estimator.Prepared) *lane {
	l := &lane{
		win:  estimator.NewNISWindow(e.window),
		rms:  make([]rmsWindow, e.p),
		x:    make([]float64, e.n),
		std:  make([]float64, e.n),
		yhat: make([]float64, e.p),
		r:    make([]float64, e.p),
		s:    make([]float64, e.p),
	}
	l.watch = estimator.NewSensorWatch(e.p, estimator.SensorWatchSettings{})
	for j := range l.rms {
		l.rms[j] = newRMSWindow(e.window)
	}
	l.f = estimator.NewFilter(p, e.x0, e.p0)
	l.setPrepared(p)
	l.lastNIS = math.NaN()
	l.states = make([]*estimator.FilterState, len(e.past))
	for i := range l.states {
		l.states[i] = l.f.NewState()
	}
	l.hist = make([]contribution, e.window+len(e.past))
	l.histR = make([]float64, len(l.hist)*e.p)
	l.winFrom = e.seq + 1
	return l
}

func (l *lane) setPrepared(p *estimator.Prepared) {
	l.prep = p
	l.gainsName, l.form = p.Set().Name, p.Form().String()
}

// use swaps the lane's gains; the filter state carries over, the
// consistency windows start again (they judge the gains).
func (l *lane) use(p *estimator.Prepared) {
	l.f.Use(p)
	l.setPrepared(p)
	l.emptyWindows()
}

// emptyWindows empties the consistency windows and the sensor watch
// between ticks.
func (l *lane) emptyWindows() {
	l.win.Reset()
	l.watch.Reset()
	for j := range l.rms {
		l.rms[j].reset()
	}
	l.emptied = true
}

// reset restarts the lane's filter at the absolute state x with covariance
// p0 (estimator.Filter.Reset) and empties its windows.
func (l *lane) reset(x []float64, p0 mat.Symmetric) {
	l.f.Reset(x, p0)
	l.emptyWindows()
	l.held, l.why = 0, ""
}

// tick runs the lane on the engine's tick e.seq: a diverged lane holds,
// then restarts; otherwise the filter steps on the tick's samples and the
// tick is judged. With rebuild (a re-run changed past ticks) the windows are
// rebuilt from the lane's history instead of being added to.
func (l *lane) tick(e *Engine, rebuild bool) {
	l.reinit = false
	if l.emptied {
		l.winFrom, l.emptied = e.seq, false
	}
	if l.held > 0 {
		// Diverged: nothing to step until the hold is over, then start
		// again from the plant's initial condition on this tick's samples.
		if l.held < DivergedHold {
			l.held++
			l.out = estimator.Outcome{}
			return
		}
		l.reset(e.x0, e.p0)
		l.reinit = true
		l.winFrom, l.emptied = e.seq, false
	}
	l.advance(e, e.seq, e.u, e.y, e.present, !rebuild)
	if rebuild {
		l.rebuildWindows(e)
	}
	for j := 0; j < e.p; j++ {
		// Sensor faults judge the sample against the prediction, an
		// outlier's too; a re-run does not judge the past again.
		inn := l.r[j]
		if math.IsNaN(inn) && e.present.Has(j) {
			inn = e.y[j] - l.yhat[j]
		}
		l.watch.Update(j, e.y[j], inn, math.Sqrt(l.s[j]), l.out.Outliers.Has(j))
	}
	l.judge(e)
}

// advance saves the filter as it is before tick seq, steps it on the tick's
// samples, reads it out and records what the tick gives the windows (adding
// it to them with windows).
func (l *lane) advance(e *Engine, seq uint64, u, y []float64, present estimator.Pattern, windows bool) {
	l.f.SaveTo(l.states[seq%uint64(len(l.states))])
	l.out = l.f.Step(u, y, present)
	l.f.StateTo(l.x)
	l.hasStd = l.f.StdTo(l.std)
	l.f.PredictedOutputTo(l.yhat)
	l.f.InnovationTo(l.r)
	l.f.InnovationVarTo(l.s)
	if l.out.HasNIS {
		l.lastNIS = l.out.NIS
	}
	hi := seq % uint64(len(l.hist))
	l.hist[hi] = contribution{seq: seq, nis: l.out.GateNIS, dof: l.out.GateDof, used: l.out.Used}
	copy(l.histR[int(hi)*e.p:int(hi+1)*e.p], l.r)
	if !windows {
		return
	}
	// The window judges every present output, the gate's refusals
	// included (clipped at the gate: estimator.Outcome.GateNIS), so that a
	// gate refusing everything cannot hide an inconsistent filter.
	if l.out.GateDof > 0 {
		l.win.Add(l.out.GateNIS, l.out.GateDof)
	}
	for j := range l.rms {
		if l.out.Used.Has(j) {
			l.rms[j].add(l.r[j])
		}
	}
}

// judge sets the windowed figures and the status of the tick just stepped.
func (l *lane) judge(e *Engine) {
	l.mean = l.win.Mean()
	l.lo, l.hi = e.band(l.win)
	l.outOfBand = l.win.Len() == e.window && !(l.mean >= l.lo && l.mean <= l.hi)
	if why := e.divergence(l); why != "" {
		l.held, l.why, l.status, l.lateFused = 1, why, StatusDiverged, false
		return
	}
	switch {
	case e.stale:
		l.status = StatusStaleInput
	case l.outOfBand || l.out.Refusing:
		l.status = StatusSuspect
	case !l.out.Corrected && !l.lateFused:
		l.status = StatusCoasting
	default:
		l.status = StatusTracking
	}
	l.lateFused = false
}

// divergence returns why lane l has diverged after its step, or "": a state
// or its covariance is not a finite number, or a state is outside the range
// the plant file gives it. It allocates only when the lane has diverged.
func (e *Engine) divergence(l *lane) string {
	if !l.f.Finite() {
		return "the state or its covariance is not a finite number"
	}
	for i, v := range l.x {
		if !e.ranges[i].Contains(v) {
			r := e.ranges[i]
			return fmt.Sprintf("state %s = %.6g is outside its range [%g, %g]", e.states[i].Name, v, r.Min, r.Max)
		}
	}
	return ""
}
