package daemon

import (
	"time"

	"surmise/estimator"
)

// Late samples. A sample belongs to the first tick at or
// after its own time. One that arrives after that tick has run is fused at
// its own time all the same while the tick lies within the signal's delay
// horizon (config.Wire.MaxDelay): the engine keeps a ring of its past ticks
// — the inputs held, the measurements used, and each lane's filter as it was
// before the step — puts the sample in its tick and re-runs every lane from
// there to the newest tick before running the current one. Older samples are
// refused as late and counted. A re-run never crosses a change of gains, a
// reset or a divergence: samples of ticks before one are refused as late.

// pastTick is one tick the engine keeps to re-run from.
type pastTick struct {
	seq          uint64
	t            time.Time
	u, y         []float64
	uAt, yAt     []time.Time // times of the held inputs' samples (zero: none) and of the outputs used
	present, fsh estimator.Pattern
}

// lateSample is a sample of a tick that has already run, waiting for the
// next tick to place it.
type lateSample struct {
	signal int
	sample
}

// horizonTicks returns the number of sample periods of the longest delay
// horizon of the plant's signals, at least one.
func horizonTicks(maxDelay time.Duration, ts float64) int {
	period := time.Duration(ts * float64(time.Second))
	if period <= 0 {
		return 1
	}
	return max(1, int((maxDelay+period-1)/period))
}

// HorizonTicks returns how many past ticks the engine keeps to fuse late
// samples at their own time: the longest max_delay of the plant's signals
// in sample periods, plus one.
func (e *Engine) HorizonTicks() int { return len(e.past) - 1 }

// record keeps the current tick in the ring.
func (e *Engine) record() {
	pt := &e.past[e.seq%uint64(len(e.past))]
	pt.seq, pt.t = e.seq, e.now
	copy(pt.u, e.u)
	copy(pt.y, e.y)
	for i := range pt.uAt {
		pt.uAt[i] = time.Time{}
		if s := &e.snap[i]; s.has {
			pt.uAt[i] = s.cur.at
		}
	}
	for j := range pt.yAt {
		pt.yAt[j] = time.Time{}
		if e.present.Has(j) {
			pt.yAt[j] = e.snap[e.m+j].cur.at
		}
	}
	pt.present, pt.fsh = e.present, e.fresh
}

// placeLate puts the late samples taken from the queue into their ticks
// and returns the earliest tick changed, 0 for none. t is the current
// tick's time: a sample's tick must lie within its signal's max_delay of it.
func (e *Engine) placeLate(t time.Time) uint64 {
	var dirty uint64
	clear(e.lateFused)
	clear(e.lateRefused)
	r := uint64(len(e.past))
	lo := e.floor
	if e.seq > r && e.seq-r+1 > lo {
		lo = e.seq - r + 1
	}
	for _, ls := range e.lateBuf[:e.lateN] {
		w := &e.wires[ls.signal]
		// The first kept tick at or after the sample's time; the one
		// before it must be known to be earlier (or be the first tick).
		var j uint64
		known := false
		for s := e.seq - 1; s >= lo && s >= 1; s-- {
			if e.past[s%r].t.Before(ls.at) {
				known = true
				break
			}
			j = s
		}
		if j == 1 && e.floor <= 1 {
			known = true
		}
		if j == 0 || !known || t.Sub(e.past[j%r].t) > w.maxDelay {
			e.countRejected(ls.signal, ReasonLate)
			e.lateRefused[ls.signal]++
			continue
		}
		if ls.signal < e.m {
			// An input holds from its own time on, until a newer one.
			i := ls.signal
			for s := j; s < e.seq; s++ {
				pt := &e.past[s%r]
				if pt.uAt[i].Before(ls.at) {
					pt.u[i], pt.uAt[i] = ls.value, ls.at
					dirty = minTick(dirty, s)
				}
			}
			e.lateFused[i]++
			continue
		}
		o := ls.signal - e.m
		pt := &e.past[j%r]
		switch {
		case pt.present.Has(o) && !pt.yAt[o].Before(ls.at):
			// A newer sample of the same tick was used: newest wins.
		case w.maxAge > 0 && pt.t.Sub(ls.at) > w.maxAge:
			e.countRejected(ls.signal, ReasonStale)
		default:
			pt.y[o], pt.yAt[o] = ls.value, ls.at
			pt.present |= 1 << uint(o)
			pt.fsh |= 1 << uint(o)
			dirty = minTick(dirty, j)
			e.lateFused[ls.signal]++
		}
	}
	e.lateN = 0
	return dirty
}

func minTick(a, b uint64) uint64 {
	if a == 0 || b < a {
		return b
	}
	return a
}

// rerun steps every lane again from tick from to the newest kept tick, on
// the ring's samples.
func (e *Engine) rerun(from uint64) {
	r := uint64(len(e.past))
	for _, l := range []*lane{e.active, e.cand} {
		if l == nil || l.held > 0 {
			continue
		}
		l.f.RestoreFrom(l.states[from%uint64(len(l.states))])
		for s := from; s < e.seq; s++ {
			pt := &e.past[s%r]
			l.advance(e, s, pt.u, pt.y, pt.present, false)
			if s == from {
				l.lateFused = l.out.Corrected
			}
		}
	}
}

// rebuildWindows fills the lane's windows again from its history: the last
// window's worth of contributions since winFrom, the re-run ticks' new ones
// included.
func (l *lane) rebuildWindows(e *Engine) {
	l.win.Reset()
	for j := range l.rms {
		l.rms[j].reset()
	}
	n := uint64(len(l.hist))
	lo := l.winFrom
	if e.seq >= n && e.seq-n+1 > lo {
		lo = e.seq - n + 1
	}
	start, cnt := e.seq+1, 0
	for s := e.seq; s >= lo && s >= 1 && cnt < e.window; s-- {
		if l.hist[s%n].dof > 0 {
			cnt++
			start = s
		}
	}
	for s := start; s <= e.seq; s++ {
		if h := &l.hist[s%n]; h.dof > 0 {
			l.win.Add(h.nis, h.dof)
		}
	}
	for j := range l.rms {
		start, cnt := e.seq+1, 0
		for s := e.seq; s >= lo && s >= 1 && cnt < e.window; s-- {
			if l.hist[s%n].used.Has(j) {
				cnt++
				start = s
			}
		}
		for s := start; s <= e.seq; s++ {
			if hi := s % n; l.hist[hi].used.Has(j) {
				l.rms[j].add(l.histR[int(hi)*e.p+j])
			}
		}
	}
}
