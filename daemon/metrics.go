package daemon

import (
	"fmt"
	"math"
	"slices"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"

	"surmise/estimator"
)

// Label names (DEVELOPERS.md, "Metric names"): the four bounded dimensions
// and the enumerations.
const (
	labelEstimator   = "estimator"
	labelOutput      = "output"
	labelState       = "state"
	labelGains       = "gains"
	labelSignal      = "signal"
	labelReason      = "reason"
	labelResult      = "result"
	labelStatus      = "status"
	labelForm        = "form"
	labelFingerprint = "fingerprint"
)

// TimingBuckets returns the upper bounds, in seconds, of the timing
// histograms (tick compute time, tick lateness, sample-to-estimate latency):
// 1, 2.5 and 5 per decade from 10 µs to 10 s. Tick periods run from about
// 1 ms (a motor bench) to 10 s (a slow thermal loop); a tick's compute time
// and lateness are small fractions of its period, and a sample's latency is
// up to about one period, so every period in that range has a few buckets
// below it and one at or just above it.
func TimingBuckets() []float64 {
	return []float64{
		10e-6, 25e-6, 50e-6,
		100e-6, 250e-6, 500e-6,
		1e-3, 2.5e-3, 5e-3,
		10e-3, 25e-3, 50e-3,
		0.1, 0.25, 0.5,
		1, 2.5, 5,
		10,
	}
}

// Metrics holds every metric of the daemon (the table in DEVELOPERS.md).
// Per-estimator series are bound once by [Metrics.Estimator], so the tick
// path does no label lookups.
type Metrics struct {
	ticks          *prometheus.CounterVec
	overruns       *prometheus.CounterVec
	compute        *prometheus.HistogramVec
	lateness       *prometheus.HistogramVec
	status         *prometheus.GaugeVec
	innovation     *prometheus.GaugeVec
	innovationRMS  *prometheus.GaugeVec
	nis            *prometheus.GaugeVec
	nisMean        *prometheus.GaugeVec
	nisLower       *prometheus.GaugeVec
	nisUpper       *prometheus.GaugeVec
	nisOutOfBand   *prometheus.CounterVec
	outliers       *prometheus.CounterVec
	sensorBias     *prometheus.GaugeVec
	sensorCUSUM    *prometheus.GaugeVec
	biasAlarms     *prometheus.CounterVec
	sensorStuck    *prometheus.GaugeVec
	lockedOut      *prometheus.GaugeVec
	dropout        *prometheus.GaugeVec
	measurementAge *prometheus.GaugeVec
	received       *prometheus.CounterVec
	rejected       *prometheus.CounterVec
	state          *prometheus.GaugeVec
	stateStddev    *prometheus.GaugeVec
	gainsInfo      *prometheus.GaugeVec
	reloads        *prometheus.CounterVec
	lastReload     *prometheus.GaugeVec
	sampleToEst    *prometheus.HistogramVec
	ready          *prometheus.GaugeVec
	busConnected   prometheus.Gauge
	busDropped     *prometheus.CounterVec
	busDisconnects prometheus.Counter

	// level says which series an estimator binds (metrics_level.go).
	level MetricsLevel
}

// NewMetrics creates the daemon's metrics at MetricsFull and registers
// them with reg. It panics if any of them is already registered there: a
// registry is built once per process, so that is a programmer mistake.
func NewMetrics(reg prometheus.Registerer) *Metrics { return NewMetricsLevel(reg, MetricsFull) }

// NewMetricsLevel is NewMetrics with the estimators' series at level.
func NewMetricsLevel(reg prometheus.Registerer, level MetricsLevel) *Metrics {
	counter := func(name, help string, labels ...string) *prometheus.CounterVec {
		return prometheus.NewCounterVec(prometheus.CounterOpts{Name: name, Help: help}, labels)
	}
	gauge := func(name, help string, labels ...string) *prometheus.GaugeVec {
		return prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: name, Help: help}, labels)
	}
	histogram := func(name, help string, labels ...string) *prometheus.HistogramVec {
		return prometheus.NewHistogramVec(prometheus.HistogramOpts{Name: name, Help: help, Buckets: TimingBuckets()}, labels)
	}
	m := &Metrics{
		level: level,
		ticks: counter("surmise_ticks_total",
			"Ticks run, by the status of the tick.", labelEstimator, labelStatus),
		overruns: counter("surmise_tick_overruns_total",
			"Ticks missed because the previous tick was still running or the scheduler woke a period or more late.", labelEstimator),
		compute: histogram("surmise_tick_compute_seconds",
			"Time from the start of a tick to its estimate.", labelEstimator),
		lateness: histogram("surmise_tick_lateness_seconds",
			"Time from a tick's due time on the schedule to its start.", labelEstimator),
		status: gauge("surmise_status",
			"1 for the status of the latest tick, 0 for the others.", labelEstimator, labelStatus),
		innovation: gauge("surmise_innovation",
			"Latest innovation (measurement minus predicted output), in output units.", labelEstimator, labelGains, labelOutput),
		innovationRMS: gauge("surmise_innovation_rms",
			"Windowed root mean square of the innovation, in output units.", labelEstimator, labelGains, labelOutput),
		nis: gauge("surmise_nis",
			"Normalised innovation squared of the latest corrected tick.", labelEstimator, labelGains),
		nisMean: gauge("surmise_nis_window_mean",
			"Mean NIS over the consistency window.", labelEstimator, labelGains),
		nisLower: gauge("surmise_nis_band_lower",
			"Lower end of the 95% chi-square band of the windowed mean NIS.", labelEstimator, labelGains),
		nisUpper: gauge("surmise_nis_band_upper",
			"Upper end of the 95% chi-square band of the windowed mean NIS.", labelEstimator, labelGains),
		nisOutOfBand: counter("surmise_nis_out_of_band_total",
			"Ticks whose windowed mean NIS was outside its band.", labelEstimator, labelGains),
		outliers: counter("surmise_outliers_total",
			"Measurements rejected by the NIS gate.", labelEstimator, labelGains, labelOutput),
		sensorBias: gauge("surmise_sensor_bias",
			"+1 while the CUSUM of the output's normalised innovation signals that the sensor reads high against the model, -1 low, 0 otherwise.", labelEstimator, labelGains, labelOutput),
		sensorCUSUM: gauge("surmise_sensor_cusum",
			"The larger of the two-sided CUSUM statistics of the output's normalised innovation, in standard deviations (alarm above 10).", labelEstimator, labelGains, labelOutput),
		biasAlarms: counter("surmise_sensor_bias_alarms_total",
			"Bias alarms raised by the CUSUM of the output's normalised innovation.", labelEstimator, labelGains, labelOutput),
		sensorStuck: gauge("surmise_sensor_stuck",
			"1 while the sensor repeats its value or its innovations are far smaller than claimed.", labelEstimator, labelGains, labelOutput),
		lockedOut: gauge("surmise_sensor_locked_out",
			"1 while the NIS gate has refused the output's last samples in a row.", labelEstimator, labelGains, labelOutput),
		dropout: gauge("surmise_sensor_dropout_ratio",
			"Share of the last 100 ticks without a fresh sample of the output.", labelEstimator, labelGains, labelOutput),
		measurementAge: gauge("surmise_measurement_age_seconds",
			"Age of the newest measurement of an output at the latest tick.", labelEstimator, labelOutput),
		received: counter("surmise_samples_received_total",
			"Samples received from the bus.", labelEstimator, labelSignal),
		rejected: counter("surmise_samples_rejected_total",
			"Samples refused, by reason.", labelEstimator, labelSignal, labelReason),
		state: gauge("surmise_state",
			"Estimated state, absolute value in state units.", labelEstimator, labelGains, labelState),
		stateStddev: gauge("surmise_state_stddev",
			"Standard deviation of the state estimate, in state units.", labelEstimator, labelGains, labelState),
		gainsInfo: gauge("surmise_gains_info",
			"Gain sets in use, with their form and model fingerprint; always 1.", labelEstimator, labelGains, labelForm, labelFingerprint),
		reloads: counter("surmise_gain_reloads_total",
			"Gain reloads, by result.", labelEstimator, labelResult),
		lastReload: gauge("surmise_gain_last_reload_success",
			"1 if the latest gain load succeeded (the load at start-up counts), 0 if it was refused.", labelEstimator),
		sampleToEst: histogram("surmise_sample_to_estimate_seconds",
			"Time from the receipt of a measurement to the publication of the estimate that used it.", labelEstimator),
		ready: gauge("surmise_ready",
			"1 when the estimator is ready (bus connected, gains valid, first tick done).", labelEstimator),
		busConnected: prometheus.NewGauge(prometheus.GaugeOpts{Name: "surmise_bus_connected",
			Help: "1 while connected to the NATS server."}),
		busDisconnects: prometheus.NewCounter(prometheus.CounterOpts{Name: "surmise_bus_disconnects_total",
			Help: "Disconnections from the NATS server."}),
		busDropped: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "surmise_bus_dropped_total",
			Help: "Messages dropped on the bus, by reason: pending-limit (a subscription's backlog was full), oversize (a publish larger than the server allows)."}, []string{labelReason}),
	}
	reg.MustRegister(m.ticks, m.overruns, m.compute, m.lateness, m.status, m.innovation, m.innovationRMS,
		m.nis, m.nisMean, m.nisLower, m.nisUpper, m.nisOutOfBand, m.outliers, m.sensorBias, m.sensorCUSUM,
		m.biasAlarms, m.sensorStuck, m.lockedOut, m.dropout, m.measurementAge, m.received,
		m.rejected, m.state, m.stateStddev, m.gainsInfo, m.reloads, m.lastReload, m.sampleToEst, m.ready,
		m.busConnected, m.busDisconnects, m.busDropped)
	for _, r := range []string{DropPendingLimit, DropOversize} {
		m.busDropped.WithLabelValues(r)
	}
	return m
}

// RegisterRuntime registers the Go runtime, process and build-information
// collectors with reg (go_*, process_*, go_build_info). It is separate from
// NewMetrics so that tests and a replay can leave them out.
func RegisterRuntime(reg prometheus.Registerer) error {
	for _, c := range []prometheus.Collector{
		collectors.NewGoCollector(),
		collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}),
		collectors.NewBuildInfoCollector(),
	} {
		if err := reg.Register(c); err != nil {
			return fmt.Errorf("registering runtime metrics: %w", err)
		}
	}
	return nil
}

// SetBusConnected sets surmise_bus_connected.
func (m *Metrics) SetBusConnected(connected bool) { m.busConnected.Set(b2f(connected)) }

// Reasons of surmise_bus_dropped_total.
const (
	DropPendingLimit = "pending-limit"
	DropOversize     = "oversize"
)

// BusDropped counts n messages dropped on the bus for reason.
func (m *Metrics) BusDropped(reason string, n int) {
	m.busDropped.WithLabelValues(reason).Add(float64(n))
}

// BusDisconnected counts one disconnection in surmise_bus_disconnects_total.
func (m *Metrics) BusDisconnected() { m.busDisconnects.Inc() }

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// EstimatorMetrics holds the series of one estimator, bound to their label
// values, for the engine to update each tick without lookups. Index
// arguments refer to the outputs, states and signals given to
// [Metrics.Estimator], in that order; an index out of range panics.
//
// Its methods allocate nothing, except Gains and Remove. It is not safe for
// concurrent use by several goroutines of the same estimator (the engine runs
// one tick at a time); the series it updates are.
type EstimatorMetrics struct {
	m                         *Metrics
	name                      string
	outputs, states, signals  []string
	ticks                     [numStatuses]prometheus.Counter
	status                    [numStatuses]prometheus.Gauge
	lastStatus                Status
	overruns                  prometheus.Counter
	compute, lateness, latest prometheus.Observer
	age                       []prometheus.Gauge
	received                  []prometheus.Counter
	rejected                  [][numReasons]prometheus.Counter
	reloadOK, reloadRefused   prometheus.Counter
	lastReload                prometheus.Gauge
	ready                     prometheus.Gauge
	primary                   *GainsMetrics

	own  seriesList // the series labelled with this estimator's name
	mu   sync.Mutex // guards sets
	sets map[*GainsMetrics]struct{}
}

// seriesList remembers series that were created, so that they can be
// deleted one by one. Deleting by a partial label match instead scans every
// series of a vector: at 10,000 estimators that made the start of each
// estimator, and each removal, cost time in proportion to the whole process
// (a quarter of an hour of CPU to start them all).
type seriesList []func() bool

// labelled is a metric vector of one kind: counters, gauges or histograms.
type labelled[T any] interface {
	WithLabelValues(lvs ...string) T
	DeleteLabelValues(lvs ...string) bool
}

// bind returns the series of v with the label values lvs, created if need
// be, and remembers it in l when it belongs to one estimator (the first
// label of every per-estimator vector is the estimator; the series of the
// whole process have it empty and are shared).
func bind[T any](l *seriesList, v labelled[T], lvs ...string) T {
	s := v.WithLabelValues(lvs...)
	if lvs[0] != "" {
		lvs = slices.Clone(lvs)
		*l = append(*l, func() bool { return v.DeleteLabelValues(lvs...) })
	}
	return s
}

// delete deletes the series of l and empties it.
func (l *seriesList) delete() {
	for _, del := range *l {
		del()
	}
	*l = nil
}

// Estimator binds the series of the estimator name: outputs, states and
// signals are the names from the plant file (signals are every input and
// output wired to the bus), gains is the name of the gain set in use, whose
// series [EstimatorMetrics.Primary] returns. Every series is created at once
// — counters at 0, value gauges at NaN until their first update — so that
// dashboards and rate() see them from the start.
//
// At MetricsSummary, the series of the whole process are bound instead of
// the estimator's where the level says so (see MetricsSummary).
func (m *Metrics) Estimator(name string, outputs, states, signals []string, gains string) *EstimatorMetrics {
	// whole is the estimator label of the series kept for the whole
	// process (the estimator's own name at MetricsFull).
	whole, full := name, m.level == MetricsFull
	if !full {
		whole = ""
	}
	e := &EstimatorMetrics{
		m:          m,
		name:       name,
		outputs:    append([]string(nil), outputs...),
		states:     append([]string(nil), states...),
		signals:    append([]string(nil), signals...),
		lastStatus: numStatuses,
		sets:       map[*GainsMetrics]struct{}{},
	}
	own := &e.own
	e.overruns = bind(own, m.overruns, name)
	e.compute = bind(own, m.compute, whole)
	e.lateness = bind(own, m.lateness, whole)
	e.latest = bind(own, m.sampleToEst, whole)
	e.reloadOK = bind(own, m.reloads, name, "ok")
	e.reloadRefused = bind(own, m.reloads, name, "refused")
	e.lastReload = bind(own, m.lastReload, name)
	e.ready = bind(own, m.ready, name)
	for s := range numStatuses {
		e.ticks[s] = bind(own, m.ticks, whole, s.String())
		e.status[s] = bind(own, m.status, name, s.String())
	}
	for _, o := range e.outputs {
		var g prometheus.Gauge = dropped{}
		if full {
			g = bind(own, m.measurementAge, name, o)
			g.Set(math.NaN())
		}
		e.age = append(e.age, g)
	}
	for _, sig := range e.signals {
		if !full {
			sig = ""
		}
		e.received = append(e.received, bind(own, m.received, whole, sig))
		var byReason [numReasons]prometheus.Counter
		for r := range numReasons {
			byReason[r] = bind(own, m.rejected, whole, sig, r.String())
		}
		e.rejected = append(e.rejected, byReason)
	}
	e.primary = e.Gains(gains)
	// The gains an estimator starts with were loaded and accepted: that
	// first load is the latest successful one, so that an alert on a
	// refused reload stays quiet on a fresh daemon.
	e.lastReload.Set(1)
	return e
}

// ObserveTick records one tick: its status, its lateness and compute time,
// and the ticks missed before it (Tick.Missed, counted as overruns).
func (e *EstimatorMetrics) ObserveTick(status Status, lateness, compute time.Duration, missed uint64) {
	e.ticks[status].Inc()
	if missed > 0 {
		e.overruns.Add(float64(missed))
	}
	e.lateness.Observe(lateness.Seconds())
	e.compute.Observe(compute.Seconds())
	if status != e.lastStatus {
		if e.lastStatus < numStatuses {
			e.status[e.lastStatus].Set(0)
		}
		e.status[status].Set(1)
		e.lastStatus = status
	}
}

// SampleReceived counts a sample received for signal i.
func (e *EstimatorMetrics) SampleReceived(i int) { e.received[i].Inc() }

// SampleRejected counts a sample of signal i refused for reason r.
func (e *EstimatorMetrics) SampleRejected(i int, r Reason) {
	if r >= numReasons {
		r = ReasonUnknown
	}
	e.rejected[i][r].Inc()
}

// SetMeasurementAge sets the age of output i's newest measurement.
func (e *EstimatorMetrics) SetMeasurementAge(i int, age time.Duration) {
	e.age[i].Set(age.Seconds())
}

// ObserveSampleToEstimate records the time from the receipt of a
// measurement to the publication of the estimate that used it.
func (e *EstimatorMetrics) ObserveSampleToEstimate(d time.Duration) { e.latest.Observe(d.Seconds()) }

// GainReload counts a gain reload and sets the last-reload gauge.
func (e *EstimatorMetrics) GainReload(ok bool) {
	if ok {
		e.reloadOK.Inc()
	} else {
		e.reloadRefused.Inc()
	}
	e.lastReload.Set(b2f(ok))
}

// SetReady sets surmise_ready.
func (e *EstimatorMetrics) SetReady(ready bool) { e.ready.Set(b2f(ready)) }

// Primary returns the series of the gain set named in Estimator.
func (e *EstimatorMetrics) Primary() *GainsMetrics { return e.primary }

// Remove deletes every series of the estimator, of all its gain sets. The
// EstimatorMetrics must not be used afterwards.
func (e *EstimatorMetrics) Remove() {
	e.own.delete()
	e.mu.Lock()
	sets := e.sets
	e.sets = map[*GainsMetrics]struct{}{}
	e.mu.Unlock()
	for g := range sets {
		g.series.delete()
	}
}

// GainsMetrics holds the series of one gain set of an estimator: the one in
// use, or a candidate running in shadow.
type GainsMetrics struct {
	e                                *EstimatorMetrics
	gains                            string
	innovation, innovationRMS        []prometheus.Gauge
	outliers                         []prometheus.Counter
	sensor                           []sensorSeries // per output
	biasAlarms                       []prometheus.Counter
	alarmsSeen                       []int
	nis, nisMean, nisLower, nisUpper prometheus.Gauge
	nisOutOfBand                     prometheus.Counter
	state, stateStddev               []prometheus.Gauge
	series                           seriesList // every series above, and surmise_gains_info
	form, fingerprint                string     // of the surmise_gains_info series set, if any

	// The values last written to the NIS band (NaN never compares equal,
	// so a NaN is written again).
	bandShown struct {
		v   [2]float64
		set bool
	}
}

// sensorGauges is the number of gauges per output set by SetSensor.
const sensorGauges = 5

// sensorSeries are the sensor gauges of one output (bias, CUSUM, stuck,
// locked out, drop-out) and the values last written to them.
type sensorSeries struct {
	gauges [sensorGauges]prometheus.Gauge
	shown  [sensorGauges]float64
	set    bool
}

// Gains binds the series of the gain set named gains (for a shadow set, or
// after a promotion). Value gauges start at NaN. At MetricsSummary, the
// innovations, states and latest NIS are dropped and the outliers counted
// for the whole process.
func (e *EstimatorMetrics) Gains(gains string) *GainsMetrics {
	m := e.m
	full := m.level == MetricsFull
	var own *seriesList // set below, once g exists
	nan := func(g prometheus.Gauge) prometheus.Gauge { g.Set(math.NaN()); return g }
	detail := func(v *prometheus.GaugeVec, labels ...string) prometheus.Gauge {
		if !full {
			return dropped{}
		}
		return nan(bind(own, v, labels...))
	}
	g := &GainsMetrics{e: e, gains: gains}
	own = &g.series
	g.nis = detail(m.nis, e.name, gains)
	g.nisMean = nan(bind(own, m.nisMean, e.name, gains))
	g.nisLower = nan(bind(own, m.nisLower, e.name, gains))
	g.nisUpper = nan(bind(own, m.nisUpper, e.name, gains))
	g.nisOutOfBand = bind(own, m.nisOutOfBand, e.name, gains)
	for _, o := range e.outputs {
		g.innovation = append(g.innovation, detail(m.innovation, e.name, gains, o))
		g.innovationRMS = append(g.innovationRMS, detail(m.innovationRMS, e.name, gains, o))
		if full {
			g.outliers = append(g.outliers, bind(own, m.outliers, e.name, gains, o))
		} else {
			g.outliers = append(g.outliers, m.outliers.WithLabelValues("", "", ""))
		}
		var ss sensorSeries
		for k, v := range [sensorGauges]*prometheus.GaugeVec{m.sensorBias, m.sensorCUSUM, m.sensorStuck, m.lockedOut, m.dropout} {
			ss.gauges[k] = bind(own, v, e.name, gains, o)
		}
		g.sensor = append(g.sensor, ss)
		g.biasAlarms = append(g.biasAlarms, bind(own, m.biasAlarms, e.name, gains, o))
		g.alarmsSeen = append(g.alarmsSeen, 0)
	}
	for _, s := range e.states {
		g.state = append(g.state, detail(m.state, e.name, gains, s))
		g.stateStddev = append(g.stateStddev, detail(m.stateStddev, e.name, gains, s))
	}
	e.mu.Lock()
	e.sets[g] = struct{}{}
	e.mu.Unlock()
	return g
}

// SetInnovation sets the latest innovation r of output i and its windowed
// RMS.
func (g *GainsMetrics) SetInnovation(i int, r, rms float64) {
	g.innovation[i].Set(r)
	g.innovationRMS[i].Set(rms)
}

// SetSensor sets the fault indicators of output i from its sensor watch;
// the bias-alarm counter advances by the alarms raised since the last call.
func (g *GainsMetrics) SetSensor(i int, st *estimator.SensorState) {
	// Most of these hold still from tick to tick: a gauge is written only
	// when its value changed, which spares the tick a cache miss per gauge
	// when thousands of estimators share the process.
	v := [sensorGauges]float64{float64(st.Bias), max(st.CUSUMHigh, st.CUSUMLow), b2f(st.Stuck), b2f(st.LockedOut), st.Dropout}
	ss := &g.sensor[i]
	for k := range v {
		if !ss.set || v[k] != ss.shown[k] {
			ss.gauges[k].Set(v[k])
		}
	}
	ss.shown, ss.set = v, true
	if d := st.BiasAlarms - g.alarmsSeen[i]; d > 0 {
		g.biasAlarms[i].Add(float64(d))
	}
	g.alarmsSeen[i] = st.BiasAlarms
}

// Outlier counts a measurement of output i rejected by the NIS gate.
func (g *GainsMetrics) Outlier(i int) { g.outliers[i].Inc() }

// SetNIS sets the latest NIS and its windowed mean; outOfBand counts a tick
// whose windowed mean is outside the band.
func (g *GainsMetrics) SetNIS(last, windowMean float64, outOfBand bool) {
	g.nis.Set(last)
	g.nisMean.Set(windowMean)
	if outOfBand {
		g.nisOutOfBand.Inc()
	}
}

// SetNISBand sets the 95 % band of the windowed mean NIS.
func (g *GainsMetrics) SetNISBand(lower, upper float64) {
	if g.bandShown.set && g.bandShown.v == [2]float64{lower, upper} {
		return // a full window's band holds still
	}
	g.nisLower.Set(lower)
	g.nisUpper.Set(upper)
	g.bandShown.v, g.bandShown.set = [2]float64{lower, upper}, true
}

// SetStates sets the estimated states (absolute values) and their standard
// deviations; stddev may be nil when the gain set gives none. Both are
// indexed like the states given to Estimator.
func (g *GainsMetrics) SetStates(x, stddev []float64) {
	for i, v := range x {
		g.state[i].Set(v)
	}
	for i, v := range stddev {
		g.stateStddev[i].Set(v)
	}
}

// SetInfo sets surmise_gains_info for this gain set, replacing the series
// of an earlier form or fingerprint.
func (g *GainsMetrics) SetInfo(form, fingerprint string) {
	if g.form == form && g.fingerprint == fingerprint && g.form != "" {
		return
	}
	if g.form != "" {
		g.e.m.gainsInfo.DeleteLabelValues(g.e.name, g.gains, g.form, g.fingerprint)
	}
	bind(&g.series, g.e.m.gainsInfo, g.e.name, g.gains, form, fingerprint).Set(1)
	g.form, g.fingerprint = form, fingerprint
}

// Remove deletes the series of this gain set (after a shadow set is dropped
// or a promoted set replaced). The GainsMetrics must not be used afterwards.
func (g *GainsMetrics) Remove() {
	g.series.delete()
	g.e.mu.Lock()
	delete(g.e.sets, g)
	g.e.mu.Unlock()
}
