package estimator

import (
	"fmt"
	"math"
)

// CUSUM defaults: the reference value k and decision interval h of the
// two-sided tabular CUSUM on a normalised innovation, in standard
// deviations. k = 0.5 tunes it to a shift of one standard deviation. The
// textbook rows h = 4 and h = 5 (Montgomery, Introduction to Statistical
// Quality Control, the ARL table of the tabular CUSUM with k = 1/2, from
// memory: in-control ARLs 168 and 465) raise a false alarm every few
// minutes per output at a 1 s tick; h = 10 raises one every 78,000 ticks
// per output on average (about 22 hours at 1 s) and still flags a bias of
// one standard deviation after about 21 ticks, of three after about 5.
// The ARLs are computed by the Markov chain of Brook and Evans in
// testdata/reference/commissioning.py and checked by simulation in the
// tests.
const (
	DefaultCUSUMK = 0.5
	DefaultCUSUMH = 10.0
)

// CUSUMClip limits the normalised innovation the CUSUM takes to
// [−CUSUMClip, CUSUMClip], so that one wild value adds at most
// CUSUMClip − K and cannot raise an alarm on its own, while a bias of many
// standard deviations still does within a few ticks. It raises the
// in-control ARL of h = 5 from 465 to 487, of h = 10 from 70,100 to
// 78,200, and the one-σ ARLs from 10.38 to 10.49 and 20.37 to 20.66 (the
// Markov chain of testdata/reference/commissioning.py).
const CUSUMClip = 3.0

// Sensor-watch defaults.
const (
	// DefaultStuckRepeats is the number of consecutive identical
	// measurements that make a sensor stuck.
	DefaultStuckRepeats = 10
	// DefaultStuckWindow is the number of the output's recent normalised
	// innovations whose mean square is compared with DefaultStuckRatio.
	DefaultStuckWindow = 30
	// DefaultStuckRatio: a mean square normalised innovation below it over
	// a full window makes a sensor stuck. For a consistent filter the mean
	// of 30 squares is χ²(30)/30; below 0.2 has probability about 10⁻⁷
	// (scipy.stats.chi2.cdf(6, 30)), so only a sensor that follows the
	// prediction far more closely than its noise allows gets there.
	DefaultStuckRatio = 0.2
	// DefaultLockoutTicks is the number of consecutive ticks on which the
	// gate rejects an output's sample that make it locked out.
	DefaultLockoutTicks = 5
	// DefaultDropoutWindow is the number of ticks over which the share of
	// ticks without a fresh sample is computed.
	DefaultDropoutWindow = 100
)

// SensorWatchSettings tunes a SensorWatch; the zero value takes every
// default above.
type SensorWatchSettings struct {
	// K and H are the CUSUM's reference value and decision interval in
	// standard deviations; 0 means DefaultCUSUMK, DefaultCUSUMH.
	K, H float64
	// Clip limits the normalised innovation the CUSUM takes to ±Clip; 0
	// means CUSUMClip, +Inf the textbook CUSUM without a limit.
	Clip float64
	// StuckRepeats, StuckWindow, StuckRatio, LockoutTicks and
	// DropoutWindow: 0 means the default of the same name.
	StuckRepeats, StuckWindow int
	StuckRatio                float64
	LockoutTicks              int
	DropoutWindow             int
}

// SensorState is what a SensorWatch says of one output after a tick.
type SensorState struct {
	// CUSUMHigh and CUSUMLow are the upper and lower CUSUM statistics, in
	// standard deviations (both ≥ 0, held at most 1.5·H).
	CUSUMHigh, CUSUMLow float64
	// Bias is +1 while CUSUMHigh exceeds H (the measurement reads high
	// against the model), −1 while CUSUMLow does, 0 otherwise.
	Bias int
	// BiasAlarms counts the times Bias became nonzero.
	BiasAlarms int
	// Stuck says the sensor has repeated its value StuckRepeats times, or
	// its innovations have been far smaller than their claimed variance.
	Stuck bool
	// Repeats is the number of consecutive identical measurements.
	Repeats int
	// MeanSquare is the mean square normalised innovation over the last
	// StuckWindow measurements; NaN until the window is full.
	MeanSquare float64
	// Dropout is the share of the last DropoutWindow ticks (fewer at the
	// start) without a fresh measurement of the output.
	Dropout float64
	// LockedOut says the gate has rejected the output's sample on the last
	// LockoutTicks ticks on which it had one.
	LockedOut bool
	// Rejected is the number of consecutive ticks with a rejected sample.
	Rejected int
}

// SensorWatch watches each output of a running filter for the faults a
// commissioning engineer meets: a bias (a two-sided tabular CUSUM of the
// normalised innovation r/√S), a stuck sensor (a repeated value, or an
// innovation variance far below its claim), drop-outs, and a gate that
// refuses every sample. Update is called once per tick per output; it
// allocates nothing.
type SensorWatch struct {
	set     SensorWatchSettings
	state   []SensorState
	last    []float64   // the last measured value
	lastStd []float64   // the last std given, for samples given without one
	sq      [][]float64 // ring of squared normalised innovations
	sqHead  []int
	sqN     []int
	sqSum   []float64
	miss    [][]bool // ring of "no fresh sample" per tick
	missAt  []int
	missN   []int
	missCnt []int
}

// NewSensorWatch returns a watch over p outputs. It panics if p < 1 or a
// setting is negative.
func NewSensorWatch(p int, set SensorWatchSettings) *SensorWatch {
	if p < 1 || set.K < 0 || set.H < 0 || set.Clip < 0 || set.StuckRepeats < 0 || set.StuckWindow < 0 ||
		set.StuckRatio < 0 || set.LockoutTicks < 0 || set.DropoutWindow < 0 {
		panic(fmt.Sprintf("estimator: NewSensorWatch(%d, %+v)", p, set))
	}
	def := func(v *float64, d float64) {
		if *v == 0 {
			*v = d
		}
	}
	defi := func(v *int, d int) {
		if *v == 0 {
			*v = d
		}
	}
	def(&set.K, DefaultCUSUMK)
	def(&set.H, DefaultCUSUMH)
	def(&set.Clip, CUSUMClip)
	def(&set.StuckRatio, DefaultStuckRatio)
	defi(&set.StuckRepeats, DefaultStuckRepeats)
	defi(&set.StuckWindow, DefaultStuckWindow)
	defi(&set.LockoutTicks, DefaultLockoutTicks)
	defi(&set.DropoutWindow, DefaultDropoutWindow)
	w := &SensorWatch{set: set, state: make([]SensorState, p), last: make([]float64, p), lastStd: make([]float64, p),
		sq: make([][]float64, p), sqHead: make([]int, p), sqN: make([]int, p), sqSum: make([]float64, p),
		miss: make([][]bool, p), missAt: make([]int, p), missN: make([]int, p), missCnt: make([]int, p)}
	for j := range w.sq {
		w.sq[j] = make([]float64, set.StuckWindow)
		w.miss[j] = make([]bool, set.DropoutWindow)
		w.last[j] = math.NaN()
		w.lastStd[j] = math.NaN()
		w.state[j].MeanSquare = math.NaN()
	}
	return w
}

// Settings returns the settings in use, defaults filled in.
func (w *SensorWatch) Settings() SensorWatchSettings { return w.set }

// Reset forgets everything, as at construction.
func (w *SensorWatch) Reset() {
	for j := range w.state {
		w.state[j] = SensorState{MeanSquare: math.NaN()}
		w.last[j] = math.NaN()
		w.lastStd[j] = math.NaN()
		w.sqHead[j], w.sqN[j], w.sqSum[j] = 0, 0, 0
		w.missAt[j], w.missN[j], w.missCnt[j] = 0, 0, 0
	}
}

// State returns output j's state after the last Update.
func (w *SensorWatch) State(j int) *SensorState { return &w.state[j] }

// Update feeds output j's tick: measured is the sample the tick took (NaN
// when it had none), innovation and std the innovation and its claimed
// standard deviation √S (either NaN when the filter did not compute them),
// rejected whether the gate refused the sample. A NaN std takes the last
// one given for the output: a filter need not report S for a sample it
// refused. The CUSUM takes the
// normalised innovation z = innovation/std of every sample, limited to
// ±CUSUMClip — a refused one too when the sample before it was refused as
// well, since a large bias is exactly what the gate refuses, while a lone
// spike is not; the variance test takes those the gate let through.
func (w *SensorWatch) Update(j int, measured, innovation, std float64, rejected bool) {
	st := &w.state[j]
	fresh := !math.IsNaN(measured)

	// Drop-outs: a ring of the last DropoutWindow ticks.
	ring := w.miss[j]
	if w.missN[j] == len(ring) {
		if ring[w.missAt[j]] {
			w.missCnt[j]--
		}
	} else {
		w.missN[j]++
	}
	ring[w.missAt[j]] = !fresh
	if !fresh {
		w.missCnt[j]++
	}
	w.missAt[j]++
	if w.missAt[j] == len(ring) {
		w.missAt[j] = 0
	}
	st.Dropout = float64(w.missCnt[j]) / float64(w.missN[j])
	if !fresh {
		return
	}

	// Gate lock-out.
	prevRejected := st.Rejected > 0
	if rejected {
		st.Rejected++
	} else {
		st.Rejected = 0
	}
	st.LockedOut = st.Rejected >= w.set.LockoutTicks

	// Repeated values.
	if measured == w.last[j] {
		st.Repeats++
	} else {
		st.Repeats = 1
	}
	w.last[j] = measured

	if std > 0 {
		w.lastStd[j] = std
	} else if math.IsNaN(std) {
		std = w.lastStd[j]
	}
	z := innovation / std
	// A lone refused sample is a spike, not evidence of a bias: the CUSUM
	// takes a refused sample only when the one before was refused too.
	if !math.IsNaN(z) && (!rejected || prevRejected) {
		// Two-sided tabular CUSUM, held at H + 2 so that an alarm clears
		// within a few ticks after the bias goes, and a bias of one σ or
		// more hardly ever dips below H while it lasts.
		zc := math.Max(-w.set.Clip, math.Min(w.set.Clip, z))
		h, k := w.set.H, w.set.K
		st.CUSUMHigh = math.Min(math.Max(0, st.CUSUMHigh+zc-k), h+2)
		st.CUSUMLow = math.Min(math.Max(0, st.CUSUMLow-zc-k), h+2)
		bias := 0
		switch {
		case st.CUSUMHigh > h && st.CUSUMHigh >= st.CUSUMLow:
			bias = 1
		case st.CUSUMLow > h:
			bias = -1
		}
		if bias != 0 && st.Bias == 0 {
			st.BiasAlarms++
		}
		st.Bias = bias
	}
	if !rejected && !math.IsInf(z, 0) {
		// Mean square over the last StuckWindow.
		sq := w.sq[j]
		if w.sqN[j] == len(sq) {
			w.sqSum[j] -= sq[w.sqHead[j]]
		} else {
			w.sqN[j]++
		}
		sq[w.sqHead[j]] = z * z
		w.sqSum[j] += z * z
		w.sqHead[j]++
		if w.sqHead[j] == len(sq) {
			w.sqHead[j] = 0
			// Recompute the running sum once per lap against drift.
			s := 0.0
			for _, v := range sq {
				s += v
			}
			w.sqSum[j] = s
		}
		st.MeanSquare = math.NaN()
		if w.sqN[j] == len(sq) {
			st.MeanSquare = w.sqSum[j] / float64(len(sq))
		}
	}
	st.Stuck = st.Repeats >= w.set.StuckRepeats || st.MeanSquare < w.set.StuckRatio
}
