// Package estimator is the numerical core of Surmise: linear models in
// deviation variables, their discretisation, observability, observer and
// Kalman gain design, and the per-tick filter step. It is pure: numbers in,
// numbers out, with no goroutines, clocks or I/O; the daemon package is the
// shell around it.
//
// # Overview
//
// Design time, on gonum matrices:
//   - [Discretise]: zero-order hold through the matrix exponential of the
//     augmented matrix, and Van Loan's method for continuous process noise.
//   - [CheckObservability]: rank of the observability matrix and a PBH test
//     per mode, for (A, C) (the prediction form) and, with
//     [CurrentFormOutput], for (A, C·A) (the current form), naming the modes
//     that are unobservable or weakly observable and whether the pair is
//     still detectable.
//   - [PlaceObserver] and [Place]: pole placement, with the achieved poles
//     checked after every design; [SolveDARE], [SteadyStateKalman],
//     [SolveDiscreteLyapunov] and [FixedGainCovariance] for Kalman gains and
//     for the error covariance of any stabilising fixed gain.
//   - [DesignPlaced] and [DesignKalman]: a whole [GainSet], with a gain per
//     pattern of available outputs when asked.
//   - [IdentifyNoise]: the process and measurement noise covariances from
//     the innovations of a fixed-gain filter, by autocovariance least
//     squares.
//
// Run time, allocation-free after construction:
//   - [Prepare] checks a [GainSet] against a [Model] once and compiles it
//     into an immutable [Prepared] set;
//   - [NewFilter] and [Filter.Step]: one tick — predict with the held input,
//     innovation on the outputs present, outlier gate, correction — for the
//     prediction form (error dynamics A − L·C), the current form
//     (A − L·C·A) and the time-varying Kalman filter (Joseph form);
//     [Filter.Use] swaps gain sets between ticks with the state carried over;
//   - [NISWindow], [MeanNISBand], [Autocorrelation], [LjungBox]: consistency
//     statistics;
//   - [SensorWatch]: per-output fault indicators (a two-sided CUSUM of the
//     normalised innovation for a bias, a stuck sensor, drop-outs, gate
//     lock-out);
//   - [NewPlant]: a seeded simulation of a model for tests and demos.
//
// # Invariants
//
// A [Model], a [GainSet] and a [Prepared] set are values: nothing here
// changes them after they are built, and callers must not either, so one
// Prepared set may serve many filters. Data changes only in a receiver
// ([Filter], [NISWindow], [Plant]) or in a dst argument of a method whose
// name ends in To. Filter.Step, its read-outs, Filter.Use, NISWindow.Add,
// SensorWatch.Update and Plant.Step allocate nothing; tests assert it with
// testing.AllocsPerRun.
//
// # Units
//
// Model matrices act on deviations from the operating point (X0, U0, Y0);
// Filter.Step takes inputs and outputs in absolute engineering units and
// its read-outs return absolute units. Sample times are in seconds. Noise
// covariances are in the squared units of their signals, per sample for a
// discrete model; a continuous intensity is per second.
//
// # What panics
//
// Programmer mistakes panic with a message naming the function: matrices of
// the wrong shape at construction, a Step with vectors of the wrong length,
// a sample time that is not positive, swapping in a set prepared for
// another model. Failures that depend on the data are returned as errors:
// a model that is not observable or detectable, poles that cannot be
// placed, a Riccati or Lyapunov equation without a stabilising solution, a
// gain file's matrices of the wrong size, unstable error dynamics, a
// covariance that is not positive definite.
package estimator
