package simplant

import (
	"fmt"
	"math"
	"math/rand/v2"
	"time"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/estimator"
)

// Role says what a Message carries.
type Role uint8

// The roles of a message.
const (
	Input  Role = iota + 1 // a plant input, on its wired subject
	Output                 // a measurement, on its wired subject
	Truth                  // a true state, on config.Plant.TruthSubject
)

// String returns "input", "output" or "truth".
func (r Role) String() string {
	switch r {
	case Input:
		return "input"
	case Output:
		return "output"
	case Truth:
		return "truth"
	}
	return fmt.Sprintf("Role(%d)", uint8(r))
}

// Message is one sample the simulated plant sends.
type Message struct {
	Role    Role
	Index   int    // among the plant's inputs, outputs or states
	Name    string // the signal's or state's name
	Subject string
	Value   float64
	K       int           // the sample number, from 0
	At      time.Duration // the sample's time from the start of the run, K·Ts
	Delay   time.Duration // how long after At it arrives; 0 unless jittered
}

// Arrival returns when the message arrives, from the start of the run.
func (m *Message) Arrival() time.Duration { return m.At + m.Delay }

// Options are the optional settings of a Sim. The zero value is seed 0 and
// the plant file's initial state.
type Options struct {
	// Seed seeds the process and measurement noise (as estimator.NewPlant
	// does), the draw of the initial state, the phase of each PRBS and the
	// jitter delays, each from a generator of its own: the noise of a run is
	// the same whatever the scenario.
	Seed uint64
	// X0 is the true initial state, absolute. Nil means the plant file's
	// initial state (by default the operating point), or with DrawInitial
	// that plus a draw from its initial covariance.
	X0 []float64
	// DrawInitial draws the true initial state from the prior the estimator
	// assumes — the plant file's initial state and covariance — so that
	// the estimate has something to converge to.
	DrawInitial bool
}

// Sim is a simulated plant running a scenario. It is pure: Step computes the
// next sample's messages and nothing else happens. Not safe for concurrent
// use.
type Sim struct {
	plant  *config.Plant
	pl     *estimator.Plant
	ts     time.Duration
	length int // scenario length in samples, ≥ 1
	repeat bool
	k      int // the next sample

	n, m, p  int
	u, y, x  []float64
	subjects []string // inputs, outputs, then truth
	names    []string
	events   []compiled
	jitter   *rand.Rand
	maxDelay time.Duration // the longest jitter of any event

	// Per signal (inputs then outputs), reused each Step.
	skip  []bool
	delay []time.Duration
	add   []float64
}

// compiled is an event in samples.
type compiled struct {
	Event
	sig   int // signal index, inputs then outputs; −1 for every signal
	start int // first sample, in scenario time
	end   int // first sample after it; −1 when it has no end
	hold  int // prbs: samples per bit
	every int // spikes: samples between spikes
	bits  [prbsPeriod]bool
}

// prbsPeriod is the period of the 7-bit maximal-length sequence.
const prbsPeriod = 127

// prbsBits fills bits with one period of the sequence of the shift register
// x⁷ + x⁶ + 1 (taps 7 and 6) from the nonzero 7-bit state s.
func prbsBits(bits *[prbsPeriod]bool, s uint8) {
	for i := range bits {
		b := (s>>6 ^ s>>5) & 1
		s = (s<<1 | b) & 0x7f
		bits[i] = b == 1
	}
}

// New returns a simulation of plant running sc. It checks sc against the
// plant (a scenario from ParseScenario or Builtin passes) and returns the
// problems as a *config.ErrorList. It panics if opts.X0 has the wrong
// length.
func New(plant *config.Plant, sc *Scenario, opts Options) (*Sim, error) {
	if err := validate(sc, plant); err != nil {
		return nil, err
	}
	md := plant.Model
	n, m, p := md.Dims()
	ts := seconds(md.Ts)
	if ts <= 0 {
		return nil, fmt.Errorf("simplant: sample time %v s is not a positive duration", md.Ts)
	}
	x0 := opts.X0
	switch {
	case x0 == nil && opts.DrawInitial:
		x0 = initialDraw(plant, opts.Seed)
	case x0 == nil:
		x0 = plant.Initial // nil: the operating point
	case len(x0) != n:
		panic(fmt.Sprintf("simplant: New: X0 has %d entries, want %d", len(x0), n))
	}
	s := &Sim{
		plant:  plant,
		pl:     estimator.NewPlant(md, opts.Seed, x0),
		ts:     ts,
		length: max(1, ticks(sc.Length, ts)),
		repeat: sc.Repeat,
		n:      n, m: m, p: p,
		u:      make([]float64, m),
		y:      make([]float64, p),
		x:      make([]float64, n),
		jitter: rand.New(rand.NewPCG(opts.Seed, opts.Seed^0x6a09e667f3bcc909)),
		skip:   make([]bool, m+p),
		delay:  make([]time.Duration, m+p),
		add:    make([]float64, m+p),
	}
	for _, w := range plant.Inputs {
		s.subjects, s.names = append(s.subjects, w.Subject), append(s.names, w.Signal)
	}
	for _, w := range plant.Outputs {
		s.subjects, s.names = append(s.subjects, w.Subject), append(s.names, w.Signal)
	}
	for i := 0; i < n; i++ {
		name := fmt.Sprintf("x%d", i+1)
		if i < len(md.States) && md.States[i].Name != "" {
			name = md.States[i].Name
		}
		s.subjects, s.names = append(s.subjects, plant.TruthSubject(name)), append(s.names, name)
	}
	phase := rand.New(rand.NewPCG(opts.Seed, opts.Seed^0xbb67ae8584caa73b))
	for _, ev := range sc.Events {
		c := compiled{Event: ev, sig: -1, start: ticks(ev.At, ts), end: -1}
		for i, name := range s.names[:m+p] {
			if name == ev.Signal {
				c.sig = i
			}
		}
		if end, ok := ev.end(); ok && ev.Kind != Spikes {
			c.end = max(ticks(end, ts), c.start+1)
		}
		switch ev.Kind {
		case PRBS:
			c.hold = max(1, ticks(ev.Hold, ts))
			prbsBits(&c.bits, uint8(1+phase.IntN(prbsPeriod)))
		case Spikes:
			c.every = max(1, ticks(ev.Every, ts))
		case Jitter:
			s.maxDelay = max(s.maxDelay, ev.Max)
		}
		s.events = append(s.events, c)
	}
	return s, nil
}

// ticks converts a duration to the nearest whole number of samples.
func ticks(d, ts time.Duration) int {
	return int(math.Round(float64(d) / float64(ts)))
}

// initialDraw returns the plant's initial state plus a draw from its
// initial covariance, from a generator of its own.
func initialDraw(plant *config.Plant, seed uint64) []float64 {
	md := plant.Model
	n, _, _ := md.Dims()
	x := make([]float64, n)
	switch {
	case plant.Initial != nil:
		copy(x, plant.Initial)
	case md.X0 != nil:
		copy(x, md.X0)
	}
	if plant.InitialCov == nil {
		return x
	}
	var es mat.EigenSym
	if !es.Factorize(plant.InitialCov, true) {
		return x
	}
	vals := es.Values(nil)
	var v mat.Dense
	es.VectorsTo(&v)
	r := rand.New(rand.NewPCG(seed, seed^0x3c6ef372fe94f82b))
	z := make([]float64, n)
	for j := range z {
		z[j] = r.NormFloat64() * math.Sqrt(math.Max(vals[j], 0))
	}
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			x[i] += v.At(i, j) * z[j]
		}
	}
	return x
}

// Ts returns the sample time.
func (s *Sim) Ts() time.Duration { return s.ts }

// Next returns the number of the sample the next Step produces.
func (s *Sim) Next() int { return s.k }

// NextAt returns the time of the sample the next Step produces, from the
// start of the run.
func (s *Sim) NextAt() time.Duration { return time.Duration(s.k) * s.ts }

// scenarioTime returns the scenario's sample number at run sample k.
func (s *Sim) scenarioTime(k int) int {
	if s.repeat {
		return k % s.length
	}
	return k
}

// active reports whether c acts at scenario sample t.
func (c *compiled) active(t int) bool {
	return t >= c.start && (c.end < 0 || t < c.end)
}

// Step advances the plant by one sample and appends that sample's messages
// to dst: the inputs and outputs that are published (in plant order, each
// with its arrival delay), then every true state. It allocates nothing when
// dst has room for m + p + n messages.
func (s *Sim) Step(dst []Message) []Message {
	k := s.k
	s.k++
	t := s.scenarioTime(k)
	md := s.plant.Model
	for i := range s.skip {
		s.skip[i], s.delay[i], s.add[i] = false, 0, 0
	}
	// Inputs: the latest step that has started, unless a PRBS covers t.
	for i := 0; i < s.m; i++ {
		s.u[i] = nominal(md.U0, i)
		stepAt, prbsAt := -1, -1
		for j := range s.events {
			c := &s.events[j]
			if c.sig != i || t < c.start {
				continue
			}
			switch {
			case c.Kind == Step && c.start >= stepAt:
				stepAt, s.u[i] = c.start, c.Value
			case c.Kind == PRBS && c.active(t) && c.start >= prbsAt:
				prbsAt = c.start
			}
		}
		if prbsAt >= 0 {
			for j := range s.events {
				c := &s.events[j]
				if c.sig == i && c.Kind == PRBS && c.start == prbsAt && c.active(t) {
					s.u[i] = c.Low
					if c.bits[((t-c.start)/c.hold)%prbsPeriod] {
						s.u[i] = c.High
					}
				}
			}
		}
	}
	// Faults.
	for j := range s.events {
		c := &s.events[j]
		switch c.Kind {
		case Dropout:
			if c.active(t) {
				s.skip[c.sig] = true
			}
		case Slow:
			if c.active(t) && (t-c.start)%c.Ticks != 0 {
				s.skip[c.sig] = true
			}
		case Bias:
			if c.active(t) {
				s.add[c.sig] += c.Value
			}
		case Spikes:
			if d := t - c.start; d >= 0 && d%c.every == 0 && d/c.every < c.Count {
				v := c.Value
				if (d/c.every)%2 == 1 {
					v = -v
				}
				s.add[c.sig] += v
			}
		case Jitter:
			if !c.active(t) {
				continue
			}
			for i := range s.delay {
				if c.sig < 0 || c.sig == i {
					s.delay[i] = max(s.delay[i], time.Duration(s.jitter.Int64N(int64(c.Max))))
				}
			}
		}
	}
	s.pl.Step(s.u)
	s.pl.OutputTo(s.y)
	s.pl.StateTo(s.x)
	at := time.Duration(k) * s.ts
	emit := func(role Role, idx, sig int, v float64, delay time.Duration) {
		dst = append(dst, Message{Role: role, Index: idx, Name: s.names[sig], Subject: s.subjects[sig],
			Value: v, K: k, At: at, Delay: delay})
	}
	for i := 0; i < s.m; i++ {
		if !s.skip[i] {
			emit(Input, i, i, s.u[i], s.delay[i])
		}
	}
	for j := 0; j < s.p; j++ {
		if i := s.m + j; !s.skip[i] {
			emit(Output, j, i, s.y[j]+s.add[i], s.delay[i])
		}
	}
	for j := 0; j < s.n; j++ {
		emit(Truth, j, s.m+s.p+j, s.x[j], 0)
	}
	return dst
}

// Stream delivers a Sim's messages in the order they arrive: by arrival
// time, and in the order Step produced them when arrival times are equal.
type Stream struct {
	sim *Sim
	q   []queued // a min-heap on (arrival, seq)
	buf []Message
	seq uint64
}

type queued struct {
	Message
	seq uint64
}

func (a *queued) before(b *queued) bool {
	if x, y := a.Arrival(), b.Arrival(); x != y {
		return x < y
	}
	return a.seq < b.seq
}

// NewStream returns a stream of sim's messages. The stream steps sim; do not
// step it elsewhere.
func NewStream(sim *Sim) *Stream { return &Stream{sim: sim} }

// Sim returns the simulation the stream steps.
func (st *Stream) Sim() *Sim { return st.sim }

// Next returns the next message to arrive, stepping the simulation as far
// as needed to be sure no later sample arrives before it. It allocates
// nothing in steady state.
func (st *Stream) Next() Message {
	for len(st.q) == 0 || st.q[0].Arrival() > st.sim.NextAt() {
		st.buf = st.sim.Step(st.buf[:0])
		for _, m := range st.buf {
			st.push(queued{m, st.seq})
			st.seq++
		}
	}
	return st.pop()
}

func (st *Stream) push(x queued) {
	st.q = append(st.q, x)
	for i := len(st.q) - 1; i > 0; {
		parent := (i - 1) / 2
		if !st.q[i].before(&st.q[parent]) {
			break
		}
		st.q[i], st.q[parent] = st.q[parent], st.q[i]
		i = parent
	}
}

func (st *Stream) pop() Message {
	top := st.q[0].Message
	last := len(st.q) - 1
	st.q[0] = st.q[last]
	st.q = st.q[:last]
	for i := 0; ; {
		l, r, small := 2*i+1, 2*i+2, i
		if l < len(st.q) && st.q[l].before(&st.q[small]) {
			small = l
		}
		if r < len(st.q) && st.q[r].before(&st.q[small]) {
			small = r
		}
		if small == i {
			break
		}
		st.q[i], st.q[small] = st.q[small], st.q[i]
		i = small
	}
	return top
}
