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
	// divergence: held counts the ticks since the lane diverged (0: it has
	// not); why says what diverged; reinit is true on the tick the lane was
	// re-initialised.
	held   int
	why    string
	reinit bool
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
	for j := range l.rms {
		l.rms[j] = newRMSWindow(e.window)
	}
	l.f = estimator.NewFilter(p, e.x0, e.p0)
	l.setPrepared(p)
	l.lastNIS = math.NaN()
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
	l.win.Reset()
	for j := range l.rms {
		l.rms[j].reset()
	}
}

// reset restarts the lane's filter at the absolute state x with covariance
// p0 (estimator.Filter.Reset) and empties its windows.
func (l *lane) reset(x []float64, p0 mat.Symmetric) {
	l.f.Reset(x, p0)
	l.win.Reset()
	for j := range l.rms {
		l.rms[j].reset()
	}
	l.held, l.why = 0, ""
}

// step runs the lane's filter on the engine's snapshot and judges the tick.
func (l *lane) step(e *Engine) {
	l.reinit = false
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
	}
	l.out = l.f.Step(e.u, e.y, e.present)
	l.f.StateTo(l.x)
	l.hasStd = l.f.StdTo(l.std)
	l.f.PredictedOutputTo(l.yhat)
	l.f.InnovationTo(l.r)
	l.f.InnovationVarTo(l.s)
	if l.out.HasNIS {
		l.lastNIS = l.out.NIS
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
	l.mean = l.win.Mean()
	l.lo, l.hi = e.band(l.win)
	l.outOfBand = l.win.Len() == e.window && !(l.mean >= l.lo && l.mean <= l.hi)
	if why := e.divergence(l); why != "" {
		l.held, l.why, l.status = 1, why, StatusDiverged
		return
	}
	switch {
	case e.stale:
		l.status = StatusStaleInput
	case l.outOfBand || l.out.Refusing:
		l.status = StatusSuspect
	case !l.out.Corrected:
		l.status = StatusCoasting
	default:
		l.status = StatusTracking
	}
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
