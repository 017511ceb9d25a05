package estimator

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// ChiSquareQuantile returns the value x with P(X ≤ x) = prob for X
// chi-square distributed with df degrees of freedom. It returns NaN when
// df < 1 or prob is outside [0, 1].
func ChiSquareQuantile(df int, prob float64) float64 {
	if df < 1 || !(prob >= 0 && prob <= 1) {
		return math.NaN()
	}
	return distuv.ChiSquared{K: float64(df)}.Quantile(prob)
}

// NISBand returns the two-sided band that one NIS value of a consistent
// filter, with dof outputs, falls inside with probability prob: the
// (1−prob)/2 and (1+prob)/2 quantiles of χ²(dof).
func NISBand(dof int, prob float64) (lo, hi float64) {
	return MeanNISBand(1, dof, prob)
}

// MeanNISBand returns the two-sided band, with probability prob, on the mean
// of n NIS values of dof outputs each. For a consistent filter n times the
// mean is χ²(n·dof) (Bar-Shalom, Li and Kirubarajan, Estimation with
// Applications to Tracking and Navigation, 2001), so the band is the
// (1−prob)/2 and (1+prob)/2 quantiles of χ²(n·dof), divided by n.
// It returns NaNs when n or dof is below 1.
func MeanNISBand(n, dof int, prob float64) (lo, hi float64) {
	if n < 1 || dof < 1 {
		return math.NaN(), math.NaN()
	}
	return sumBand(n*dof, prob, float64(n))
}

// sumBand is the band on a sum of NIS values with df degrees of freedom in
// total, divided by count.
func sumBand(df int, prob, count float64) (lo, hi float64) {
	a := (1 - prob) / 2
	return ChiSquareQuantile(df, a) / count, ChiSquareQuantile(df, 1-a) / count
}

// NISWindow holds the most recent NIS values of a filter, each with its own
// number of degrees of freedom (the number of outputs it was computed with),
// and tells whether their mean is consistent with the filter's claims.
//
// A tick without a NIS (coasting, predict only) adds nothing: call Add only
// for ticks whose Outcome has HasNIS, or pass dof 0, which Add ignores.
//
// Add and Mean never allocate. Band computes two chi-square quantiles, which
// takes microseconds; the last band is cached, so in steady state (a full
// window of equal dof) it costs a comparison.
type NISWindow struct {
	nis  []float64
	dof  []int
	head int // index the next value goes to
	n    int // values held
	df   int // sum of dof over the values held

	// cache of the last Band call
	cDF, cN int
	cProb   float64
	cLo     float64
	cHi     float64
}

// NewNISWindow returns an empty window that holds the last n values.
// It panics if n < 1.
func NewNISWindow(n int) *NISWindow {
	if n < 1 {
		panic(fmt.Sprintf("estimator: NIS window of length %d, want at least 1", n))
	}
	return &NISWindow{nis: make([]float64, n), dof: make([]int, n), cDF: -1}
}

// Add records one NIS value computed with dof outputs, dropping the oldest
// value when the window is full. Values with dof < 1, and NaN or negative
// values, are ignored.
func (w *NISWindow) Add(nis float64, dof int) {
	if dof < 1 || !(nis >= 0) || math.IsInf(nis, 1) {
		return
	}
	if w.n == len(w.nis) {
		w.df -= w.dof[w.head]
	} else {
		w.n++
	}
	w.nis[w.head] = nis
	w.dof[w.head] = dof
	w.df += dof
	w.head++
	if w.head == len(w.nis) {
		w.head = 0
	}
}

// Len returns the number of values held.
func (w *NISWindow) Len() int { return w.n }

// Dof returns the sum of the degrees of freedom of the values held.
func (w *NISWindow) Dof() int { return w.df }

// Reset empties the window.
func (w *NISWindow) Reset() {
	w.n, w.head, w.df = 0, 0, 0
}

// Mean returns the mean NIS per value held, NaN when the window is empty.
func (w *NISWindow) Mean() float64 {
	if w.n == 0 {
		return math.NaN()
	}
	// The values held are the first n slots until the ring wraps, then all;
	// either way they are nis[:n] in some order.
	s := 0.0
	for _, v := range w.nis[:w.n] {
		s += v
	}
	return s / float64(w.n)
}

// Band returns the two-sided band, with probability prob, on Mean for the
// current contents: the sum of the values held is χ²(Dof()) for a consistent
// filter, so the band is the (1−prob)/2 and (1+prob)/2 quantiles of
// χ²(Dof()) divided by Len(). With equal dof per value this is MeanNISBand.
// It returns NaNs when the window is empty.
func (w *NISWindow) Band(prob float64) (lo, hi float64) {
	if w.n == 0 {
		return math.NaN(), math.NaN()
	}
	if w.df == w.cDF && w.n == w.cN && prob == w.cProb {
		return w.cLo, w.cHi
	}
	lo, hi = sumBand(w.df, prob, float64(w.n))
	w.cDF, w.cN, w.cProb, w.cLo, w.cHi = w.df, w.n, prob, lo, hi
	return lo, hi
}

// Inside reports whether Mean lies inside Band(prob). An empty window is
// inside: there is no evidence against the filter.
func (w *NISWindow) Inside(prob float64) bool {
	if w.n == 0 {
		return true
	}
	lo, hi := w.Band(prob)
	m := w.Mean()
	return m >= lo && m <= hi
}

// Autocorrelation writes to dst the normalised sample autocorrelation of the
// sequence r at lags 1, …, len(dst):
//
//	ρ(j) = Σ_t (r_t − r̄)(r_{t+j} − r̄) / Σ_t (r_t − r̄)²
//
// and returns dst. The innovations of an optimal filter are white: LjungBox
// turns ρ into a test of that.
// It panics if len(dst) ≥ len(r). A constant sequence gives NaNs.
func Autocorrelation(dst []float64, r []float64) []float64 {
	if len(dst) >= len(r) {
		panic(fmt.Sprintf("estimator: %d autocorrelation lags of a sequence of %d", len(dst), len(r)))
	}
	mean := 0.0
	for _, v := range r {
		mean += v
	}
	mean /= float64(len(r))
	c0 := 0.0
	for _, v := range r {
		d := v - mean
		c0 += d * d
	}
	for j := range dst {
		lag := j + 1
		s := 0.0
		for t := 0; t+lag < len(r); t++ {
			s += (r[t] - mean) * (r[t+lag] - mean)
		}
		dst[j] = s / c0
	}
	return dst
}
