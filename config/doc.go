// Package config reads the two files a Surmise user deals with — the plant
// file, written by hand, and the gains file, written by surmise design — and
// turns them into validated values of the estimator package.
//
// # Overview
//
// ParsePlant and ParseGains are pure functions of the file name (used in
// messages) and the bytes; LoadPlant and LoadGains only add the read. There
// is no watching, no caching and no package state: a reload is a new parse.
//
// Parsing is strict. A file holds exactly one YAML document; an unknown or
// repeated key, a value of the wrong type, a missing required key, a matrix
// whose size does not match the lists of states, inputs and outputs, a
// number that is not finite (.nan, .inf) and every other rule below are
// errors. All errors of a file are reported together, sorted by position,
// each as
//
//	file:line:column: field.path: message
//
// in an *ErrorList (indices in field paths count from 0).
//
// # The plant file
//
// One file per estimator. A complete, annotated example (the invented
// hot-water loop of testdata/plants, shortened to what each key needs):
//
//	name: hotwater-loop          # required: a lowercase letter, then lowercase letters,
//	                             # digits, '-' or '_' (≤ 63); used in subjects and metric labels
//	model:                       # required
//	  time: continuous           # required: continuous (A, B, C, D describe dx/dt, discretised
//	                             # by zero-order hold) or discrete (x(k+1) = A·x(k) + B·u(k))
//	  sample: 1s                 # required: the tick, a Go duration (500ms, 1s, 1m); > 0
//	  A:                         # required: n×n, a list of rows; n = number of states
//	    - [-0.1383,   0.1383,    0,         0]
//	    - [ 0.001447, -0.005209, 0.003704, -0.005814]
//	    - [ 0,         0.1062,  -0.1312,    0]
//	    - [ 0,         0,         0,         0]
//	  B: [[0.5556], [0], [0], [0]]  # required: n×m, m = number of inputs (at least one)
//	  C:                         # required: p×n, p = number of outputs (1 to 64)
//	    - [0, 1,     0,     0]
//	    - [0, 0.238, 0.762, 0]
//	  # D: p×m, optional, default zeros
//	states:                      # required, in the order of A's rows; names are unique
//	                             # across states, inputs and outputs
//	  - name: element_temp       # required: a letter, then letters, digits, '-' or '_'
//	    unit: degC               # optional, default "" (dimensionless)
//	    nominal: 91.2            # operating point (absolute), optional, default 0; the model
//	                             # is in deviations from it and estimates are published absolute
//	  - {name: tank_temp, unit: degC, nominal: 61.0}
//	  - {name: wall_temp, unit: degC, nominal: 52.3}
//	  - {name: heat_loss, unit: kW}
//	inputs:                      # required, in the order of B's columns
//	  - name: heater_power
//	    unit: kW
//	    nominal: 6.0
//	    subject: pilot.hwl.jc100.out  # required: where samples arrive; dot-separated tokens,
//	                             # no wildcards (* >) or spaces, unique in the file
//	    max_age: 5s              # optional: older samples are stale; default 3 sample periods
//	    range: [0, 9]            # optional: [lo, hi], lo < hi, holding nominal; samples
//	                             # outside are rejected
//	outputs:                     # required, in the order of C's rows; keys as for inputs
//	  - {name: tank_outlet, unit: degC, nominal: 61.0, subject: pilot.hwl.tt110.pv,
//	     max_age: 3s, range: [0, 99]}
//	  - {name: hx_outlet, unit: degC, nominal: 54.4, subject: pilot.hwl.tt120.pv,
//	     max_age: 3s, range: [0, 99]}
//	noise:                       # required
//	  process:                   # required: std (one per state, ≥ 0, a diagonal) or
//	                             # covariance (n×n, symmetric positive semidefinite)
//	    time: continuous         # optional, default the model's time. continuous: the
//	                             # numbers are a spectral density (units²/s; std in units/√s),
//	                             # discretised with the model by Van Loan's method; discrete:
//	                             # the covariance of one sample. A discrete model takes discrete.
//	    std: [0.02, 0.002, 0.01, 0.0005]
//	  measurement:               # required: the covariance of one sample; std (one per
//	                             # output, > 0) or covariance (p×p, positive definite)
//	    std: [0.05, 0.05]
//	initial:                     # optional
//	  state: [91.2, 61, 52.3, 0] # optional: absolute initial state, default the nominal values
//	  std: [5, 1, 3, 0.3]        # optional: std (≥ 0) or covariance (n×n, positive
//	                             # semidefinite); default none: start from the gain set's
//	                             # steady-state covariance
//	gains: hotwater-loop.gains.yaml  # optional: the gains file, relative to this file's
//	                             # directory; default <name>.gains.yaml
//	gate: 0.999                  # optional: outlier-gate probability in [0, 1); 0 disables
//	                             # the gate; default 0.999
//	publish: surmise.hotwater-loop  # optional: estimates go to <publish>.estimate; default
//	                             # surmise.<name>; no wildcards; no input or output may use
//	                             # <publish>.estimate or <publish>.shadow.estimate
//	window: 100                  # optional: windowed-NIS length in ticks, 1 to 1000000;
//	                             # default 100
//
// Times are always Go duration strings with their unit ("100ms", "1s",
// "2m"); a bare number is an error, so that nobody has to guess the unit.
//
// Symmetry of a covariance is checked to a relative 1e-9 (files written by
// other programs round), definiteness with gonum's EigenSym, an eigenvalue
// within 1e-12 of the largest counting as zero.
//
// # The gains file
//
// Written by surmise design, read back by check, replay and run, and
// readable by hand:
//
//	# Gain sets written by surmise design for the plant "double-integrator".
//	fingerprint: sha256:876c…  # required: Fingerprint of the plant's discrete model
//	plant: double-integrator  # optional, informative
//	active: poles-half        # required: the set the estimator runs
//	candidate: kf             # optional: a set run in shadow, not the active one
//	sets:                     # required, at least one; names unique
//	  - name: poles-half      # letters, digits, '.', '-', '_' (≤ 63); the gains metric label
//	    form: prediction      # prediction, current or kalman (see estimator.Form)
//	    gains:                # prediction and current forms: one entry per output pattern,
//	                          # one of them for all outputs
//	      - outputs: [pos, vel]  # the outputs the gain uses, in the plant's order
//	        L: [[0.5, 0.1], [0, 0.5]]  # n × (outputs listed), columns in that order
//	        S: [[0.0002, 0], [0, 0.005]]  # optional: innovation covariance, positive definite
//	        P: [[0.0001, 0], [0, 0.002]]  # optional: error covariance, positive semidefinite
//	        poles: ["0.5", "0.5"]  # optional: the achieved error-dynamics eigenvalues,
//	                          # n of them, as strings "0.81" or "0.5+0.2i" (numbers accepted)
//	    provenance:           # required
//	      method: poles       # required: how the set was designed (poles, kalman, ...)
//	      poles: ["0.5", "0.5"]  # optional: the poles that were requested
//	      factor: 2           # optional: a design factor
//	      created: "2025-06-01T14:03:00Z"  # optional: RFC 3339
//	      tool: surmise v0.1.0  # optional
//	      note: first commissioning  # optional
//	  - name: kf
//	    form: kalman          # the time-varying Kalman filter: no fixed gains,
//	    Q: [[1e-06, 0], [0, 0.0001]]  # but its process (n×n) and
//	    R: [[0.0001, 0], [0, 0.0025]]  # measurement (p×p) covariances
//	    provenance: {method: kalman}
//
// A gains file is refused when its fingerprint is not the plant model's
// ("designed for a different model"), and when estimator.Prepare refuses a
// set — among its rules, that the error dynamics of every fixed gain
// (A − L·C for the prediction form, A − L·C·A for the current form, C
// restricted to the pattern's outputs) have all eigenvalues inside the unit
// circle. Prepare runs on a set once the file's own checks of that set have
// passed, so the file is judged by the code that will run it. The stated
// poles are informative and not compared with the computed ones.
//
// # Fingerprint
//
// Fingerprint hashes a canonical encoding of the discrete model: the
// dimensions, A, B, C, D, the sample time and the signal names (see its
// documentation for the exact bytes). Units, operating point, noise and
// wiring are not part of it: a gain designed for the model stays valid when
// they change.
//
// # What panics
//
// Nothing in this package panics on the content of a file. ParseGains and
// NewGainsFile panic when given a nil plant.
package config
