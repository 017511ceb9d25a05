// Package simplant puts a simulated plant on the bus: the inputs, the noisy
// measurements and the true hidden states of a plant file's model, sample by
// sample, with the scripted events an engineer wants to rehearse before the
// real plant does them — an input step or a PRBS-like excitation, a sensor
// that drops out, a sensor whose reading steps by a bias, outlier spikes, a
// slow sensor that reports only every k samples, and samples that arrive
// late by a random amount.
//
// # Overview
//
// The package has a pure core and a thin shell. Sim (pure: no goroutines,
// clocks or I/O) steps an estimator.Plant seeded with a given seed and
// applies a Scenario, producing the Messages of each sample with their
// times as offsets from the start of the run. Stream puts those messages in
// the order they arrive. The shell gives them wall-clock times: Publish
// sends them to NATS at their arrival times (scaled by a speed factor), and
// WriteRecording writes them as a bus recording at once, in virtual time,
// so that a recording made from a seed is the same bytes every time.
//
// # Subjects and payloads
//
// Inputs and outputs go to the subjects the plant file wires them to. The
// true states go to "<publish prefix>.truth.<state name>", where the
// publish prefix is the plant's `publish` key (default
// "surmise.<plant name>"); config.Plant.TruthSubject returns it. Every payload is the
// JSON form the daemon decodes, {"value": 61.23, "time": "RFC 3339 with
// nanoseconds, UTC"}; the time is the sample's time, so a sample whose
// arrival was delayed still carries the time it was taken.
//
// # Scenarios
//
// A scenario is a small YAML file of timed events, in plant time:
//
//	name: rehearsal          # optional
//	length: 2m               # optional: default, the end of the last event
//	repeat: true             # optional: start over after length (default false)
//	events:
//	  - {at: 0s,   prbs: heater_power, low: 4.2, high: 7.8, hold: 4s, for: 40s}
//	  - {at: 40s,  step: heater_power, value: 7.8}
//	  - {at: 20s,  dropout: tank_outlet, for: 10s}
//	  - {at: 45s,  bias: hx_outlet, value: 1.0, for: 20s}
//	  - {at: 70s,  spikes: tank_outlet, value: 2.0, count: 3, every: 4s}
//	  - {at: 85s,  slow: hx_outlet, ticks: 5, for: 20s}
//	  - {at: 105s, jitter: all, max: 400ms, for: 15s}
//
// Each event has `at` and exactly one kind key, whose value names the
// signal it acts on:
//
//   - step: an input; from `at` on the input is `value`.
//   - prbs: an input; from `at` for `for` the input switches between `low`
//     and `high` following a 7-bit maximal-length shift-register sequence
//     (x⁷ + x⁶ + 1, period 127) clocked every `hold`; the sequence's phase
//     comes from the seed.
//   - dropout: any wired signal; nothing is published for `for`.
//   - bias: an output; `value` is added to its reading for `for` (or, without
//     `for`, to the end of the scenario).
//   - spikes: an output; `count` (default 1) readings `every` apart get
//     `value` added, with alternating signs (+, −, +, …).
//   - slow: any wired signal; for `for` it is published on one sample in
//     `ticks` only (a slower sensor on the same bus).
//   - jitter: a wired signal, or `all`; for `for` each sample arrives a
//     random delay in [0, `max`) after its time (the payload keeps its time).
//
// The input at a scenario time is the value of the latest `step` that has
// started (its nominal value before any), unless a `prbs` window covers that
// time (the latest starting one wins). With `repeat`, the scenario starts
// over every `length` — inputs back at their nominal values — and without
// it, after `length` nothing more happens: faults are over and the inputs
// stay at their latest step. Times are rounded to the nearest sample.
// Durations are Go durations ("500ms", "4s", "1m30s").
//
// ParseScenario reads a file strictly: an unknown or repeated key, a missing
// or wrong-typed field, a signal that is not wired or of the wrong kind, a
// value outside the signal's range or an event that ends after `length` is an
// error that names the file, line, column and field (a *config.ErrorList).
// Builtin returns the built-in scenarios, made for any plant from its wiring
// and noise: "rehearsal" (every kind of event, about two minutes, repeated)
// and "steady" (a PRBS on every input, no faults). Format writes a scenario
// as a file ParseScenario reads back.
//
// # The true initial state
//
// The plant starts from the plant file's initial state (by default its
// operating point), where the estimator starts too. With
// Options.DrawInitial it starts from a draw from the prior the estimator
// assumes — the initial state plus a draw from the initial covariance —
// so the estimator has something to converge to. (A fixed gain set judges
// its innovations by the steady-state S stored with it, so while the
// estimate converges from a distant start its outlier gate may reject the
// measurements for a while: rehearse that on purpose.)
package simplant
