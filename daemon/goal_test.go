package daemon

import (
	"fmt"
	"math"
	"os"
	"testing"
)

// Goal is one goal of a measurement: a figure the issue or the
// documentation promises, and the bound it must meet. The measurement tests
// (run with SURMISE_MEASURE set) state their goals as Goals and hand them to
// CheckGoals, so that every measurement reports and fails the same way.
// Exported for the daemon_test package; it is compiled into tests only.
type Goal struct {
	What    string  // the figure, e.g. "p99 sample-to-estimate latency"
	Got     float64 // the measured value
	Limit   float64 // the bound
	Unit    string  // the unit of Got and Limit, e.g. "ms", "cores"
	AtLeast bool    // the figure must be at least Limit; else at most
}

// Met reports whether the goal is met.
func (g Goal) Met() bool {
	if g.AtLeast {
		return g.Got >= g.Limit
	}
	return g.Got <= g.Limit
}

// String says the figure against its goal and, when it misses, by how much,
// absolutely and relative to the bound.
func (g Goal) String() string {
	cmp := "≤"
	if g.AtLeast {
		cmp = "≥"
	}
	s := fmt.Sprintf("%s %.4g %s (goal %s %.4g %s)", g.What, g.Got, g.Unit, cmp, g.Limit, g.Unit)
	if g.Met() {
		return s + ": met"
	}
	miss := math.Abs(g.Got - g.Limit)
	s += fmt.Sprintf(": MISSED by %.4g %s", miss, g.Unit)
	if g.Limit != 0 {
		s += fmt.Sprintf(" (%.1f %% of the goal)", 100*miss/math.Abs(g.Limit))
	}
	return s
}

// CheckGoals logs every goal and fails the test once for each one missed,
// saying by how much. Measurement runs only: call it after
// MeasureDuration, or where SURMISE_MEASURE is known to be set. The load of
// the machine is added to a failure, since a loaded machine misses timing
// goals that a quiet one meets; the goal fails all the same.
func CheckGoals(t testing.TB, goals ...Goal) {
	t.Helper()
	for _, g := range goals {
		if g.Met() {
			t.Log(g)
			continue
		}
		t.Errorf("%s%s", g, loadNote())
	}
}

// loadNote returns the one-minute load average, for a failure message.
func loadNote() string {
	b, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return ""
	}
	var load float64
	if _, err := fmt.Sscan(string(b), &load); err != nil {
		return ""
	}
	return fmt.Sprintf(" [load average %.2f]", load)
}

// MeasureRun reports whether this is a measurement run (SURMISE_MEASURE
// set), in which the goals are judged.
func MeasureRun() bool { return os.Getenv("SURMISE_MEASURE") != "" }

// TestGoalSaysByHowMuch checks the wording of a missed goal and the
// direction of both kinds of bound.
func TestGoalSaysByHowMuch(t *testing.T) {
	for _, tc := range []struct {
		g    Goal
		met  bool
		want string
	}{
		{Goal{"p99 latency", 10.9, 10.5, "ms", false}, false, "p99 latency 10.9 ms (goal ≤ 10.5 ms): MISSED by 0.4 ms (3.8 % of the goal)"},
		{Goal{"CPU", 0.3, 0.5, "cores", false}, true, "CPU 0.3 cores (goal ≤ 0.5 cores): met"},
		{Goal{"delivered", 0.93, 0.95, "of ticks", true}, false, "delivered 0.93 of ticks (goal ≥ 0.95 of ticks): MISSED by 0.02 of ticks (2.1 % of the goal)"},
		{Goal{"delivered", 0.99, 0.95, "of ticks", true}, true, "delivered 0.99 of ticks (goal ≥ 0.95 of ticks): met"},
	} {
		if tc.g.Met() != tc.met || tc.g.String() != tc.want {
			t.Errorf("%+v: met %v, %q; want %v, %q", tc.g, tc.g.Met(), tc.g.String(), tc.met, tc.want)
		}
	}
}
