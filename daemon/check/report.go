package check

import (
	"math"
	"math/cmplx"
)

// Report is what `surmise check` reports, and exactly what
// `surmise check --json` prints. The JSON field names are a stable interface:
// fields may be added, none renamed or removed. Numbers are rounded to ten
// significant digits (the gains file keeps full precision); times are in
// seconds; eigenvalues are {re, im, abs}, an imaginary part below
// 1e-6·max(1, |λ|) reported as 0 (see snap).
type Report struct {
	// Plant is the plant's name, File the plant file as given.
	Plant string `json:"plant"`
	File  string `json:"file"`
	// Fingerprint identifies the discrete model (config.Fingerprint); a gains
	// file carries the fingerprint of the model it was designed for.
	Fingerprint string `json:"fingerprint"`
	// Model is the discrete model the estimator runs and how it was obtained.
	Model Model `json:"model"`
	// Eigenvalues are those of the discrete A, largest modulus first, each
	// complex-conjugate pair with its positive member first.
	Eigenvalues []Eigenvalue `json:"eigenvalues"`
	// Observability is the test of both observer forms.
	Observability struct {
		// Prediction is the pair (A, C): the prediction form, and the
		// Kalman filter.
		Prediction Form `json:"prediction"`
		// Current is the pair (A, C·A): the current form.
		Current Form `json:"current"`
	} `json:"observability"`
	// Wiring is one entry per input, then per output.
	Wiring []Wire `json:"wiring"`
	// Noise summarises the process and measurement noise.
	Noise Noise `json:"noise"`
	// Settings are the plant file's run-time settings.
	Settings Settings `json:"settings"`
	// Gains is the gains file that was read; null when there was none.
	Gains *Gains `json:"gains"`
	// CanRun is the verdict: the exit status is 0 when it is true.
	CanRun bool `json:"can_run"`
	// Problems are the reasons CanRun is false (empty when it is true).
	Problems []string `json:"problems"`
	// Notes are remarks that do not stop the estimator.
	Notes []string `json:"notes"`
}

// Model is the discrete model and its origin.
type Model struct {
	// Time is how the file gave the model: "continuous" or "discrete".
	Time string `json:"time"`
	// Discretisation says in words how the discrete model was obtained.
	Discretisation string `json:"discretisation"`
	// ProcessNoise is how the file gave the process noise: "continuous" (a
	// spectral density, discretised by Van Loan's method) or "discrete" (a
	// covariance per sample).
	ProcessNoise string `json:"process_noise"`
	// SampleSeconds is Ts.
	SampleSeconds float64 `json:"sample_seconds"`
	// States, Inputs and Outputs name the rows and columns of the matrices.
	States  []Signal `json:"states"`
	Inputs  []Signal `json:"inputs"`
	Outputs []Signal `json:"outputs"`
	// A, B, C, D are the discrete matrices as lists of rows.
	A [][]float64 `json:"A"`
	B [][]float64 `json:"B"`
	C [][]float64 `json:"C"`
	D [][]float64 `json:"D"`
}

// Signal is a state, input or output: name, unit, operating point.
type Signal struct {
	Name    string  `json:"name"`
	Unit    string  `json:"unit"`
	Nominal float64 `json:"nominal"`
}

// Eigenvalue is one eigenvalue of A.
type Eigenvalue struct {
	Re  float64 `json:"re"`
	Im  float64 `json:"im"`
	Abs float64 `json:"abs"`
	// Kind is "stable", "deadbeat" (λ = 0), "integrator" (λ = 1),
	// "marginal" (elsewhere on the unit circle) or "unstable".
	Kind string `json:"kind"`
	// TimeConstantSeconds is the continuous-equivalent time constant
	// −Ts/ln|λ| of a stable mode, the e-folding growth time Ts/ln|λ| of an
	// unstable one; null for λ = 0 and on the unit circle.
	TimeConstantSeconds *float64 `json:"time_constant_seconds"`
	// PeriodSeconds is the oscillation period 2π·Ts/|arg λ| of a complex
	// eigenvalue (2·Ts for a negative real one, which alternates in sign);
	// null otherwise.
	PeriodSeconds *float64 `json:"period_seconds"`
}

// Form is CheckObservability of one pair.
type Form struct {
	// Pair is "(A, C)" or "(A, C·A)".
	Pair string `json:"pair"`
	// Rank is the numerical rank of the observability matrix, of States.
	Rank   int `json:"rank"`
	States int `json:"states"`
	// Observable and Detectable are the verdicts of estimator.Observability.
	Observable bool `json:"observable"`
	Detectable bool `json:"detectable"`
	// Modes is the PBH test of each distinct eigenvalue.
	Modes []Mode `json:"modes"`
}

// Mode is one distinct eigenvalue of A and what the PBH test says.
type Mode struct {
	Re  float64 `json:"re"`
	Im  float64 `json:"im"`
	Abs float64 `json:"abs"`
	// SigmaMin is the scaled smallest singular value of [λI − A; C]: 0 for
	// a mode the outputs do not see, up to 1 for one they see plainly.
	SigmaMin   float64 `json:"sigma_min"`
	Observable bool    `json:"observable"`
	Weak       bool    `json:"weak"`
	Stable     bool    `json:"stable"`
	// Involves names the states with a share of at least 0.1 in the mode's
	// direction (estimator.Mode.Direction), largest first.
	Involves []Share `json:"involves"`
}

// Share is a state's component in a mode's unit direction.
type Share struct {
	State string  `json:"state"`
	Share float64 `json:"share"`
}

// Wire is one input or output on the bus.
type Wire struct {
	Signal  string  `json:"signal"`
	Kind    string  `json:"kind"` // "input" or "output"
	Subject string  `json:"subject"`
	Unit    string  `json:"unit"`
	Nominal float64 `json:"nominal"`
	// MaxAgeSeconds is the age beyond which a sample is stale.
	MaxAgeSeconds float64 `json:"max_age_seconds"`
	// Range is [lo, hi]; null when the signal has none.
	Range []float64 `json:"range"`
}

// Noise summarises the noise covariances.
type Noise struct {
	// ProcessDensityStd is √diag of the continuous spectral density Qc
	// (units/√s), when the file gave one; null otherwise.
	ProcessDensityStd []float64 `json:"process_density_std"`
	// ProcessStd is √diag of the discrete Q: the standard deviation of one
	// sample's process noise, per state.
	ProcessStd []float64 `json:"process_std"`
	// ProcessCorrelated is true when Q has off-diagonal entries.
	ProcessCorrelated bool `json:"process_correlated"`
	// MeasurementStd is √diag of R, per output.
	MeasurementStd []float64 `json:"measurement_std"`
	// MeasurementCorrelated is true when R has off-diagonal entries.
	MeasurementCorrelated bool `json:"measurement_correlated"`
}

// Settings is the plant file's run-time settings.
type Settings struct {
	GainsFile string  `json:"gains_file"`
	Gate      float64 `json:"gate"`
	Window    int     `json:"window"`
	Publish   string  `json:"publish"`
}

// Gains is a gains file and the error dynamics of its sets.
type Gains struct {
	// File is the gains file; FromPlant is true when it is the plant's own
	// (no gains argument was given).
	File      string `json:"file"`
	FromPlant bool   `json:"from_plant"`
	// Errors are the problems config found in the file, each
	// "file:line:column: field: message"; when there are any, Sets is empty.
	Errors    []string `json:"errors"`
	Active    string   `json:"active"`
	Candidate string   `json:"candidate"`
	Sets      []Set    `json:"sets"`
}

// Set is one gain set.
type Set struct {
	Name string `json:"name"`
	// Role is "active", "candidate" or "".
	Role string `json:"role"`
	Form string `json:"form"`
	// Method, Created, Tool, Note, Factor and RequestedPoles are the
	// set's provenance.
	Method         string   `json:"method"`
	Created        string   `json:"created"`
	Tool           string   `json:"tool"`
	Note           string   `json:"note"`
	Factor         float64  `json:"factor"`
	RequestedPoles []string `json:"requested_poles"`
	// Patterns are the gains of a fixed-gain set, the one for all outputs
	// first; for a kalman set, one entry: its steady state for all outputs.
	Patterns []Dynamics `json:"patterns"`
	// Uncovered lists the subsets of outputs without a gain of their own
	// for which (A, C) is detectable: on a tick with only those outputs the
	// estimator predicts without correcting. Null for a kalman set, which
	// corrects with any subset, and for plants with more than 10 outputs.
	Uncovered [][]string `json:"uncovered"`
	// Error is why estimator.Prepare refuses the set; "" when it accepts it.
	Error string `json:"error"`
}

// Dynamics is the error dynamics of one gain.
type Dynamics struct {
	Outputs []string `json:"outputs"`
	// Poles are the eigenvalues of the error dynamics, computed here.
	Poles []Pole `json:"poles"`
	// SpectralRadius is the largest |pole|.
	SpectralRadius float64 `json:"spectral_radius"`
	// ConvergenceSeconds is −Ts/ln(SpectralRadius), the time constant of the
	// slowest error mode; null when the dynamics are not stable.
	ConvergenceSeconds *float64 `json:"convergence_seconds"`
	// NIS is true when the gain has its innovation covariance S, which makes
	// NIS, the consistency checks and the outlier gate available.
	NIS bool `json:"nis"`
}

// Pole is one eigenvalue.
type Pole struct {
	Re  float64 `json:"re"`
	Im  float64 `json:"im"`
	Abs float64 `json:"abs"`
}

// snap reports an eigenvalue whose imaginary part is below
// 1e-6·max(1, |λ|) as real: that is the scatter rounding gives a repeated
// real eigenvalue (a double pole at 0.5 comes out as 0.5 ± 5e-9i), not an
// oscillation.
func snap(l complex128) complex128 {
	if math.Abs(imag(l)) < 1e-6*math.Max(1, cmplx.Abs(l)) {
		return complex(real(l), 0)
	}
	return l
}

// unitTol is how close to the unit circle (or to 0) an eigenvalue's modulus
// must be to be called an integrator or marginal (deadbeat).
const unitTol = 1e-9
