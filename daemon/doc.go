// Package daemon is the imperative shell of Surmise: it runs estimators on a
// fixed-rate clock, takes their samples from NATS, publishes their estimates,
// and reports on itself through Prometheus metrics and HTTP probes.
//
// # Overview
//
// The numerics live in package estimator and are pure. This package adds
// what they leave out: time, goroutines, the network.
//
//   - [Scheduler] (ticksource.go): one per process; calls each estimator's
//     tick function at t0 + k·Ts on the monotonic clock.
//   - [Engine] (engine.go): one per estimator; samples in, one estimate per
//     tick out, driven by the clock it is given — the scheduler in a live
//     run, the recording's timestamps in a replay.
//   - [DecodeSample] (payload.go): a bus payload to a value and its time, or
//     a refusal with a [Reason].
//   - [StartEmbedded] and [Connect] (bus.go): the in-process NATS server and
//     the client connection, with reconnection and credentials.
//   - [Metrics] (metrics.go): every series of the daemon, bound per
//     estimator so that a tick does no label lookups.
//   - [HTTPServer] (http.go): /metrics, /healthz, /readyz, and a hook for
//     the live page.
//   - [Group] (group.go): the goroutines of the daemon and their shutdown.
//   - [Commissioner] (reload.go, shadow.go): one per estimator; gains
//     reloaded without a restart, a candidate set in shadow, promotion,
//     roll-back and reset, each validated first and applied between ticks;
//     [Watcher] (watch.go) watches the files' directories, [Audit]
//     (audit.go) keeps the trail, [StartControl] (control.go) answers on
//     surmise.control.<estimator>.<verb>.
//
// # The tick
//
// Tick k of an estimator is due at t0 + k·Ts exactly. The scheduler keeps
// the phase: a late tick does not move the next one. A tick that falls due
// while the estimator's previous tick is still queued or running, or that the
// scheduler wakes a whole period or more too late for, is skipped — never
// delivered in a bunch after the fact — and counted: [Tick].Missed on the
// next tick that runs, surmise_tick_overruns_total in the metrics. Each tick
// reports its lateness (start − due), which the engine's caller records in
// surmise_tick_lateness_seconds alongside the compute time.
//
// On Linux the scheduler's timing goroutine is locked to an OS thread and
// sleeps with clock_nanosleep to absolute CLOCK_MONOTONIC deadlines, with the
// thread's timer slack at 1 ns; elsewhere it waits on a time.Timer. Either
// way it only times: the estimators' functions run on a small pool of worker
// goroutines (GOMAXPROCS by default), one tick of a given estimator at a
// time.
//
// # Goroutines and shutdown
//
// No constructor in this package starts a goroutine or opens a socket. The
// long-lived goroutines are started by the caller, each through [Group.Go]:
// the scheduler's Run, the HTTP server's Serve, and whatever else the daemon
// needs. A goroutine that fails cancels the group; [Group.Stop] cancels it
// too, is idempotent, and waits for every goroutine.
//
// The order of shutdown matters. Stop the scheduler first (its Run returns
// after the ticks in flight finish), then close the bus with [Bus.Close],
// which drains — subscriptions stop, received messages are handled, pending
// publishes flushed — and waits for the connection's closed handler; then
// shut the embedded server down, if there is one; the HTTP server goes last,
// so that probes answer until the end.
//
// The bus client reconnects forever with back-off and jitter, and keeps no
// reconnect buffer: an estimate that could not be published during an outage
// is dropped rather than delivered late, when it would look current. A bus
// outage makes the daemon not ready (/readyz) but not unhealthy (/healthz):
// the estimators keep ticking, coasting on their model.
//
// # Metrics
//
// Metric names and labels are those of the table in DEVELOPERS.md: prefix
// surmise_, base units, _total counters, _seconds histograms, and the labels
// estimator, output, state, gains, plus the bounded enumerations signal,
// reason, result and status. [NewMetrics] registers them with a registry the
// caller passes in; [RegisterRuntime] adds the Go runtime, process and build
// information collectors.
//
// [Metrics.Estimator] binds an estimator's series once; its methods, called
// on every tick, allocate nothing. All of an estimator's series exist from
// that moment (counters at 0, value gauges at NaN until their first value)
// and [EstimatorMetrics.Remove] deletes them. Series that depend on a gain
// set carry its name in the gains label; a shadow set binds its own with
// [EstimatorMetrics.Gains].
//
// Timing histograms share the buckets of [TimingBuckets]: 1, 2.5 and 5 per
// decade from 10 µs to 10 s, which brackets tick periods from 1 ms to 10 s.
//
// # Changing gains at run time
//
// Three triggers take one path: SIGHUP ([Daemon.Reload]), a change in the
// directory of a plant or gains file, and a control request carrying a
// gains file. The path is parse (config.ParseGains), validate (the model's
// fingerprint, dimensions, finite numbers, error dynamics inside the unit
// circle, S where the outlier gate needs it: estimator.Prepare), then hand
// the prepared set to the engine, which swaps it at the start of its next
// tick. The state carries over (and P, Kalman to Kalman): the estimate does
// not jump because of the swap, and no tick runs with parts of two sets. A
// refused reload leaves the running gains alone and says why — in the log
// with the file's name and line, in surmise_gain_reloads_total{result} and
// surmise_gain_last_reload_success, in the status and the control reply. A
// plant file that changed (model, wiring, settings) is refused: it needs a
// restart. Promotion and roll-back are held back by a minimum dwell time
// ([Options].MinDwell). Every accepted change is appended to
// StateDir/gains-audit.jsonl and kept in memory for status replies.
package daemon
