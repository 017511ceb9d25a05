// Package report turns the results of a replay, one run per gain set over
// the same recording, into numbers (Summarise) and a self-contained HTML
// page (WriteHTML) that compares the gain sets side by side.
//
// # Input
//
// The replay driver fills an Input: names and units of the states and
// outputs, and for each gain set a Run whose Ticks hold the per-tick results
// column by column (one slice per quantity, NaN where a value is absent).
// A day at 10 Hz is 864,000 ticks; columns cost no allocation per tick
// (Ticks.Append copies a reused TickRow) and are what the statistics and
// plots read. Validate checks the lengths; Summarise panics on an Input that
// fails it, WriteHTML returns its error.
//
// # Statistics
//
// Per run: ticks by status, outliers rejected, the mean NIS against the mean
// number of outputs it was computed with, the fraction of ticks whose NIS
// lies inside the two-sided 95 % band of χ²(dof) for that tick's dof
// (quantiles from gonum's distuv), the fraction of ticks whose windowed mean
// NIS lies inside the band the engine computed for it, and per output the
// innovation's mean and RMS, the whiteness test — the Ljung–Box statistic
// over the normalised autocorrelations at lags 1 to 10 and its chi-square
// p-value (Ljung and Box, Biometrika 65(2), 1978; white when p ≥
// WhitenessLevel) — the share of ticks without a sample, and the episodes
// of the sensor's fault indicators (Ticks.Faults). When the recording
// holds the true states: per state the error RMS and the share of ticks
// with |error| ≤ 2σ (about 95 % for an honest σ). Which NIS a tick with an
// outlier carries is the driver's choice; the statistics take every tick
// with Dof > 0 as it comes.
//
// # The page
//
// One HTML file with inline CSS and inline SVG, drawn with gonum/plot: no
// scripts, fonts, images or style sheets from anywhere, so it opens offline
// and can be mailed. The table puts first what matters when the truth is
// known (error RMS and 2σ coverage per state and set, side by side). Plots
// share one time axis: innovations per output with the ±2√S each gain set
// claims and bars for its fault episodes, the NIS (the largest of each time
// bucket, the windowed mean and its band, on a log scale), and the states
// with ±2σ and, for a simulated recording, the true states. Each gain set
// has a colour and a dash. The y-limits of the innovation and state plots
// hold every value that lasts more than two ticks and the settled bands; a
// spike beyond them is marked by a triangle at the edge. Series longer than
// 2·Buckets points are reduced to the minimum and maximum of each of
// Buckets time buckets, so a one-tick spike survives and a day of ticks
// makes a page of about half a megabyte. A line breaks where its values stop
// for more than two buckets (or ten ticks, when longer), so an outage shows
// as a gap while a sensor slower than the tick rate draws one line.
package report
