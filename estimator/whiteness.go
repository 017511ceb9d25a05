package estimator

import (
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// LjungBox returns the Ljung–Box portmanteau statistic of the normalised
// sample autocorrelations rho (at lags 1, …, h = len(rho), as
// Autocorrelation writes them) of a sequence of n values,
//
//	Q = n·(n + 2)·Σ_{k=1..h} ρ(k)² / (n − k),
//
// and its p-value, the probability that χ²(h) exceeds Q (Ljung and Box,
// "On a measure of lack of fit in time series models", Biometrika 65(2),
// 1978). The innovations of a filter are not residuals of a model fitted
// to the same data, so no degrees of freedom are subtracted. A small p says
// the sequence is not white: the filter leaves structure in its innovations
// (a wrong model, or a gain far from optimal). It returns NaNs when rho is
// empty, n ≤ h, or an autocorrelation is NaN (a constant sequence).
func LjungBox(rho []float64, n int) (q, p float64) {
	h := len(rho)
	if h == 0 || n <= h {
		return math.NaN(), math.NaN()
	}
	s := 0.0
	for k, r := range rho {
		s += r * r / float64(n-(k+1))
	}
	q = float64(n) * float64(n+2) * s
	if math.IsNaN(q) {
		return math.NaN(), math.NaN()
	}
	return q, distuv.ChiSquared{K: float64(h)}.Survival(q)
}
