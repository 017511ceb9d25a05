package estimator

import (
	"gonum.org/v1/gonum/mat"
)

// Form is the structure of the per-tick correction.
type Form int

const (
	// Prediction is the one-step-ahead observer
	// x̂(k+1|k) = A·x̂(k|k−1) + B·u(k) + L·(y(k) − C·x̂(k|k−1) − D·u(k)),
	// with error dynamics A − L·C.
	Prediction Form = iota + 1
	// Current is the predictor–corrector observer
	// x̂(k|k) = x̂(k|k−1) + L·(y(k) − C·x̂(k|k−1) − D·u(k)),
	// with error dynamics A − L·C·A; it needs (A, C·A) observable.
	Current
	// Kalman is the time-varying Kalman filter: the covariance is propagated
	// every tick and the gain is computed for the outputs present.
	Kalman
)

// String returns the name used in files and on the bus.
func (f Form) String() string {
	switch f {
	case Prediction:
		return "prediction"
	case Current:
		return "current"
	case Kalman:
		return "kalman"
	}
	return "unknown"
}

// ParseForm is the inverse of Form.String.
func ParseForm(s string) (Form, bool) {
	switch s {
	case "prediction":
		return Prediction, true
	case "current":
		return Current, true
	case "kalman":
		return Kalman, true
	}
	return 0, false
}

// Pattern is a set of outputs, bit i standing for output i.
type Pattern uint64

// FullPattern returns the pattern with all p outputs present.
func FullPattern(p int) Pattern {
	if p >= 64 {
		return ^Pattern(0)
	}
	return Pattern(1)<<uint(p) - 1
}

// Has reports whether output i is in the pattern.
func (s Pattern) Has(i int) bool { return s&(1<<uint(i)) != 0 }

// Len returns the number of outputs in the pattern.
func (s Pattern) Len() int {
	n := 0
	for x := s; x != 0; x &= x - 1 {
		n++
	}
	return n
}

// Indices appends the indices of the outputs in the pattern, ascending, to dst.
func (s Pattern) Indices(dst []int) []int {
	for i := 0; s != 0; i++ {
		if s&1 != 0 {
			dst = append(dst, i)
		}
		s >>= 1
	}
	return dst
}

// PatternGain is a fixed gain designed for one pattern of present outputs.
type PatternGain struct {
	Outputs Pattern    // which outputs the gain was designed with
	L       *mat.Dense // n × Outputs.Len(), columns in ascending output order

	// S is the steady-state innovation covariance for these outputs
	// (Outputs.Len() square). It makes NIS meaningful and drives the outlier
	// gate; nil when the noise is unknown, and then no NIS is computed.
	S *mat.SymDense
	// P is the steady-state error covariance of the published estimate
	// (a priori for the prediction form, a posteriori for the current form);
	// nil when the noise is unknown.
	P *mat.SymDense
	// Poles are the achieved error-dynamics eigenvalues.
	Poles []complex128
}

// GainSet is everything the filter needs besides the model: a form, and
// either fixed gains per pattern (Prediction, Current) or the noise
// covariances a time-varying Kalman filter propagates (Kalman).
// A GainSet is a value; it is checked against a model by Prepare.
type GainSet struct {
	Name string
	Form Form

	// Gains holds fixed gains, one per pattern, the full pattern first
	// (Prediction and Current forms only).
	Gains []PatternGain

	// Q and R are the noise covariances of the Kalman form (n×n and p×p).
	Q, R *mat.SymDense
}
