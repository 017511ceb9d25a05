//go:build linux

package estimator

import (
	"syscall"
	"time"
)

// threadCPU returns the CPU time the calling OS thread has used (user and
// system), from getrusage(RUSAGE_THREAD). Benchmarks lock their goroutine
// to its thread and report this beside the wall time: on a machine shared
// with other work, it leaves out the time the thread waited to run.
func threadCPU() (time.Duration, bool) {
	const rusageThread = 1 // RUSAGE_THREAD, Linux
	var ru syscall.Rusage
	if err := syscall.Getrusage(rusageThread, &ru); err != nil {
		return 0, false
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano()), true
}
