package report

import (
	"math"
	"time"

	"gonum.org/v1/gonum/stat/distuv"
)

// Lags is the number of autocorrelation lags of the whiteness test.
const Lags = 10

// MaxOutside is the most lags, of Lags, whose autocorrelation may fall
// outside ±1.96/√N for an innovation sequence to be called white. Each lag
// of a white sequence falls outside with probability 0.05, so three or more
// of ten do with probability 0.0115 (binomial; see testdata/reference.py).
const MaxOutside = 2

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
}

// OutputSummary is the statistics of one output's innovations.
type OutputSummary struct {
	Name, Unit string

	N         int     // ticks with an innovation for this output
	Mean, RMS float64 // of the innovation, in the output's unit

	// Autocorr[j] is the normalised autocorrelation at lag j+1 (see
	// Autocorrelation); Bound is 1.96/√N; Outside counts the lags beyond
	// ±Bound; White is Outside ≤ MaxOutside. Autocorr is nil when N ≤ Lags.
	Autocorr []float64
	Bound    float64
	Outside  int
	White    bool
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
		if o.N > 0 {
			o.Mean = sum / float64(o.N)
			o.RMS = math.Sqrt(sq / float64(o.N))
			o.Bound = 1.96 / math.Sqrt(float64(o.N))
		}
		if o.N > Lags {
			o.Autocorr = Autocorrelation(make([]float64, Lags), col)
			for _, rho := range o.Autocorr {
				if !(math.Abs(rho) <= o.Bound) {
					o.Outside++
				}
			}
			o.White = o.Outside <= MaxOutside
		}
		s.Outputs[j] = o
	}
	return s
}

// Autocorrelation writes to dst the normalised sample autocorrelation, at
// lags 1, …, len(dst), of the values of r that are not NaN, taken in order
// (ticks without an innovation are left out, so the lags of a sensor that
// reports every fifth tick count its own samples, not ticks):
//
//	ρ(j) = Σ_t (r_t − r̄)(r_{t+j} − r̄) / Σ_t (r_t − r̄)²
//
// Whiteness test after Mehra, "On the identification of variances and
// adaptive Kalman filtering", IEEE TAC 15(2), 1970 (cited from memory): for a
// white sequence of N values each ρ(j) lies inside ±1.96/√N with
// probability about 0.95. A constant sequence gives NaNs; a lag at or
// beyond the number of values gives 0. It returns dst.
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
