package report

import (
	"math"
	"time"

	"gonum.org/v1/gonum/stat/distuv"

	"surmise/estimator"
)

// Lags is the number of autocorrelation lags of the whiteness test.
const Lags = 10

// WhitenessLevel is the significance level of the whiteness test: an
// innovation sequence whose Ljung–Box p-value is below it is called not
// white. A white sequence is called not white with this probability.
const WhitenessLevel = 0.01

// Summary is the statistics of one run, the numbers of the report's table.
type Summary struct {
	Gains, Form, Fingerprint string

	Ticks      int
	Start, End time.Time

	// Ticks by status; Other counts status words not listed here.
	Tracking, Coasting, StaleInput, Suspect, Other int

	Outliers int // samples rejected by the gate

	// NISTicks is the number of ticks with a NIS (at least one output).
	NISTicks int
	// MeanNIS is the mean NIS over those ticks; MeanDof the mean number of
	// outputs in it, which is what MeanNIS should be for a consistent filter.
	MeanNIS, MeanDof float64
	// NISInBand is the fraction of NISTicks whose NIS lies inside the
	// two-sided 95 % band of χ²(dof) for that tick's dof; about 0.95 for a
	// consistent filter.
	NISInBand float64

	// Windows is the number of ticks with a windowed mean NIS and its band;
	// WindowsInBand the fraction of them with the mean inside the band.
	Windows       int
	WindowsInBand float64

	Outputs []OutputSummary

	// States holds, when the recording has the true states, the error of
	// each state against the truth; nil otherwise.
	States []StateSummary
}

// StateSummary is the error of one state's estimate against the truth.
type StateSummary struct {
	Name, Unit string
	// N is the number of ticks with both an estimate and a true value.
	N int
	// RMS is the root mean square of the error estimate − truth.
	RMS float64
	// Coverage is the fraction of the ticks with a standard deviation on
	// which |error| ≤ 2σ: about 0.95 for a filter whose σ is honest; NaN
	// without σ. CoverageN is the number of those ticks.
	Coverage  float64
	CoverageN int
}

// FaultEpisode is a stretch of consecutive ticks on which one fault
// indicator of an output was raised.
type FaultEpisode struct {
	Kind       uint8 // one of the Fault bits
	From, To   int   // first and last tick, inclusive
	Start, End time.Time
}

// FaultName names a Fault bit for a summary line.
func FaultName(kind uint8) string {
	switch kind {
	case FaultBiasHigh:
		return "bias, reads high"
	case FaultBiasLow:
		return "bias, reads low"
	case FaultStuck:
		return "stuck"
	case FaultLockedOut:
		return "locked out by the gate"
	}
	return "fault"
}

// OutputSummary is the statistics of one output's innovations.
type OutputSummary struct {
	Name, Unit string

	N         int     // ticks with an innovation for this output
	Mean, RMS float64 // of the innovation, in the output's unit

	// Autocorr[j] is the normalised autocorrelation at lag j+1 (see
	// Autocorrelation), nil when N ≤ Lags; Bound is 1.96/√N, the 95 %
	// bound on one lag, for reading them.
	Autocorr []float64
	Bound    float64
	// LjungBox and P are the Ljung–Box statistic over lags 1 to Lags and
	// its p-value (estimator.LjungBox); White is P ≥ WhitenessLevel. NaN
	// and false when Autocorr is nil.
	LjungBox, P float64
	White       bool

	// Dropout is the fraction of ticks without an innovation for this
	// output (no fresh sample, or a stale one).
	Dropout float64
	// Faults are the episodes of the sensor's fault indicators, in time
	// order; nil without a Faults column.
	Faults []FaultEpisode
}

// Summarise computes the Summary of every run of in, in order. It panics if
// in is not valid (see Validate).
func Summarise(in *Input) []Summary {
	if err := in.Validate(); err != nil {
		panic(err)
	}
	bands := newNISBands()
	out := make([]Summary, len(in.Runs))
	for i := range in.Runs {
		out[i] = summariseRun(in, &in.Runs[i], bands)
	}
	return out
}

// nisBands caches the two-sided 95 % band of χ²(dof) by dof.
type nisBands struct{ lo, hi []float64 }

func newNISBands() *nisBands { return &nisBands{} }

func (b *nisBands) band(dof int) (lo, hi float64) {
	for len(b.lo) <= dof {
		k := len(b.lo)
		if k == 0 {
			b.lo, b.hi = append(b.lo, math.NaN()), append(b.hi, math.NaN())
			continue
		}
		d := distuv.ChiSquared{K: float64(k)}
		b.lo = append(b.lo, d.Quantile(0.025))
		b.hi = append(b.hi, d.Quantile(0.975))
	}
	return b.lo[dof], b.hi[dof]
}

func summariseRun(in *Input, r *Run, bands *nisBands) Summary {
	t := &r.Ticks
	k := t.Len()
	s := Summary{Gains: r.Gains, Form: r.Form, Fingerprint: r.Fingerprint, Ticks: k,
		Start: t.Time[0], End: t.Time[k-1]}
	for _, st := range t.Status {
		switch st {
		case "tracking":
			s.Tracking++
		case "coasting":
			s.Coasting++
		case "stale-input":
			s.StaleInput++
		case "suspect":
			s.Suspect++
		default:
			s.Other++
		}
	}
	for _, o := range t.Outliers {
		s.Outliers += o
	}
	var sumNIS, sumDof float64
	inBand := 0
	for i, v := range t.NIS {
		d := t.Dof[i]
		if d < 1 || math.IsNaN(v) {
			continue
		}
		s.NISTicks++
		sumNIS += v
		sumDof += float64(d)
		if lo, hi := bands.band(d); v >= lo && v <= hi {
			inBand++
		}
	}
	s.MeanNIS, s.MeanDof, s.NISInBand = math.NaN(), math.NaN(), math.NaN()
	if s.NISTicks > 0 {
		s.MeanNIS = sumNIS / float64(s.NISTicks)
		s.MeanDof = sumDof / float64(s.NISTicks)
		s.NISInBand = float64(inBand) / float64(s.NISTicks)
	}
	inside := 0
	for i, m := range t.NISMean {
		lo, hi := t.BandLo[i], t.BandHi[i]
		if math.IsNaN(m) || math.IsNaN(lo) || math.IsNaN(hi) {
			continue
		}
		s.Windows++
		if m >= lo && m <= hi {
			inside++
		}
	}
	s.WindowsInBand = math.NaN()
	if s.Windows > 0 {
		s.WindowsInBand = float64(inside) / float64(s.Windows)
	}
	s.Outputs = make([]OutputSummary, len(in.OutputNames))
	for j, name := range in.OutputNames {
		o := OutputSummary{Name: name}
		if in.OutputUnits != nil {
			o.Unit = in.OutputUnits[j]
		}
		col := t.Innovations[j]
		var sum, sq float64
		for _, v := range col {
			if !math.IsNaN(v) {
				o.N++
				sum += v
				sq += v * v
			}
		}
		o.Mean, o.RMS, o.Bound = math.NaN(), math.NaN(), math.NaN()
		o.LjungBox, o.P = math.NaN(), math.NaN()
		if o.N > 0 {
			o.Mean = sum / float64(o.N)
			o.RMS = math.Sqrt(sq / float64(o.N))
			o.Bound = 1.96 / math.Sqrt(float64(o.N))
		}
		if o.N > Lags {
			o.Autocorr = Autocorrelation(make([]float64, Lags), col)
			o.LjungBox, o.P = estimator.LjungBox(o.Autocorr, o.N)
			o.White = o.P >= WhitenessLevel
		}
		o.Dropout = 1 - float64(o.N)/float64(k)
		if t.Faults != nil {
			o.Faults = faultEpisodes(t.Faults[j], t.Time)
		}
		s.Outputs[j] = o
	}
	if in.Truth != nil {
		s.States = stateErrors(in, r)
	}
	return s
}

// faultEpisodes finds the runs of each fault bit in one output's column.
func faultEpisodes(col []uint8, times []time.Time) []FaultEpisode {
	var out []FaultEpisode
	for _, kind := range []uint8{FaultBiasHigh, FaultBiasLow, FaultStuck, FaultLockedOut} {
		from := -1
		for k := 0; k <= len(col); k++ {
			on := k < len(col) && col[k]&kind != 0
			switch {
			case on && from < 0:
				from = k
			case !on && from >= 0:
				out = append(out, FaultEpisode{Kind: kind, From: from, To: k - 1, Start: times[from], End: times[k-1]})
				from = -1
			}
		}
	}
	// In time order.
	for i := 1; i < len(out); i++ {
		for j := i; j > 0 && out[j].From < out[j-1].From; j-- {
			out[j], out[j-1] = out[j-1], out[j]
		}
	}
	return out
}

// stateErrors compares a run's states with the truth.
func stateErrors(in *Input, r *Run) []StateSummary {
	out := make([]StateSummary, len(in.StateNames))
	for i, name := range in.StateNames {
		st := StateSummary{Name: name, RMS: math.NaN(), Coverage: math.NaN()}
		if in.StateUnits != nil {
			st.Unit = in.StateUnits[i]
		}
		est := r.Ticks.States[i]
		var std []float64
		if r.Ticks.StateStd != nil {
			std = r.Ticks.StateStd[i]
		}
		sq, inside := 0.0, 0
		for k, tv := range in.Truth[i] {
			d := est[k] - tv
			if math.IsNaN(d) {
				continue
			}
			st.N++
			sq += d * d
			if std != nil && std[k] >= 0 {
				st.CoverageN++
				if math.Abs(d) <= 2*std[k] {
					inside++
				}
			}
		}
		if st.N > 0 {
			st.RMS = math.Sqrt(sq / float64(st.N))
		}
		if st.CoverageN > 0 {
			st.Coverage = float64(inside) / float64(st.CoverageN)
		}
		out[i] = st
	}
	return out
}

// Autocorrelation writes to dst the normalised sample autocorrelation, at
// lags 1, …, len(dst), of the values of r that are not NaN, taken in order
// (ticks without an innovation are left out, so the lags of a sensor that
// reports every fifth tick count its own samples, not ticks):
//
//	ρ(j) = Σ_t (r_t − r̄)(r_{t+j} − r̄) / Σ_t (r_t − r̄)²
//
// For a white sequence of N values each ρ(j) lies inside ±1.96/√N with
// probability about 0.95 (Mehra, "On the identification of variances and
// adaptive Kalman filtering", IEEE TAC 15(2), 1970, cited from memory);
// estimator.LjungBox combines them into one test. A constant sequence
// gives NaNs; a lag at or beyond the number of values gives 0. It returns
// dst.
func Autocorrelation(dst, r []float64) []float64 {
	x := make([]float64, 0, len(r))
	mean := 0.0
	for _, v := range r {
		if !math.IsNaN(v) {
			x = append(x, v)
			mean += v
		}
	}
	mean /= float64(len(x))
	c0 := 0.0
	for i, v := range x {
		x[i] = v - mean
		c0 += x[i] * x[i]
	}
	for j := range dst {
		lag := j + 1
		s := 0.0
		for t := 0; t+lag < len(x); t++ {
			s += x[t] * x[t+lag]
		}
		dst[j] = s / c0
	}
	return dst
}
