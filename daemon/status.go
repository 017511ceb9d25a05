package daemon

import "strconv"

// Status is the status of one tick of an estimator. Its String is the value
// of the `status` label of surmise_ticks_total and surmise_status.
type Status uint8

// The statuses of a tick (Engine.Tick step 4 says which one a tick gets).
const (
	StatusTracking   Status = iota // "tracking": corrected with at least one fresh measurement
	StatusCoasting                 // "coasting": no fresh measurement; predicted only
	StatusStaleInput               // "stale-input": an input was older than its max_age
	StatusSuspect                  // "suspect": the windowed NIS is outside its chi-square band
	numStatuses
)

var statusNames = [numStatuses]string{
	StatusTracking:   "tracking",
	StatusCoasting:   "coasting",
	StatusStaleInput: "stale-input",
	StatusSuspect:    "suspect",
}

// String returns the label value of s, or "Status(n)" for a value outside
// the enumeration.
func (s Status) String() string {
	if s >= numStatuses {
		return "Status(" + strconv.Itoa(int(s)) + ")"
	}
	return statusNames[s]
}
