//go:build !linux

package estimator

import "time"

// threadCPU is not available here: benchmarks report wall time only.
func threadCPU() (time.Duration, bool) { return 0, false }
