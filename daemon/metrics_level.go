package daemon

import (
	"fmt"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

// MetricsLevel says how many series each estimator has.
type MetricsLevel int

const (
	// MetricsFull, the default, gives each estimator every series of the
	// metrics table (about 85 for 10 states, 3 inputs and 2 outputs).
	MetricsFull MetricsLevel = iota
	// MetricsSummary keeps, per estimator, only what says whether it is
	// healthy: surmise_status, surmise_ready, surmise_tick_overruns_total,
	// the windowed mean NIS with its band and out-of-band count,
	// surmise_gains_info and the reload results (15 series), and the
	// sensor-health series of each output (bias, CUSUM, stuck, locked out,
	// drop-out, bias alarms), which the alert rules use. The
	// timing histograms, surmise_ticks_total and the sample and outlier
	// counters are kept for the whole process, with the estimator label
	// (and the signal and output labels) empty; innovations, states,
	// their standard deviations, the latest NIS and measurement ages are
	// not exported (the estimates on the bus carry them). For a fleet
	// process of thousands of estimators, whose scrape would otherwise be
	// hundreds of thousands of series.
	MetricsSummary
)

// String returns the level's name, as the --metrics flag takes it.
func (l MetricsLevel) String() string {
	switch l {
	case MetricsFull:
		return "full"
	case MetricsSummary:
		return "summary"
	}
	return fmt.Sprintf("MetricsLevel(%d)", int(l))
}

// ParseMetricsLevel returns the level named s: "full" or "summary".
func ParseMetricsLevel(s string) (MetricsLevel, error) {
	switch s {
	case "full":
		return MetricsFull, nil
	case "summary":
		return MetricsSummary, nil
	}
	return 0, fmt.Errorf("metrics level %q: want full or summary", s)
}

// dropped is a series a metrics level leaves out: it is registered nowhere
// and its updates do nothing, so the tick path calls it like any other.
type dropped struct{}

var (
	_ prometheus.Gauge    = dropped{}
	_ prometheus.Counter  = dropped{}
	_ prometheus.Observer = dropped{}
)

func (dropped) Set(float64)                      {}
func (dropped) Inc()                             {}
func (dropped) Dec()                             {}
func (dropped) Add(float64)                      {}
func (dropped) Sub(float64)                      {}
func (dropped) SetToCurrentTime()                {}
func (dropped) Observe(float64)                  {}
func (dropped) Desc() *prometheus.Desc           { return nil }
func (dropped) Write(*dto.Metric) error          { return nil }
func (dropped) Describe(chan<- *prometheus.Desc) {}
func (dropped) Collect(chan<- prometheus.Metric) {}
