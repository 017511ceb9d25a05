//go:build linux

package daemon

import (
	"context"
	"runtime"
	"time"

	"golang.org/x/sys/unix"
)

// nanosleepMaxSleep bounds one sleep of the Linux source, which cannot be
// woken early: Run notices a cancelled context within this time, and a job
// added during a sleep gets its first deadline no earlier than the sleep's
// end. 20 ms costs 50 idle wake-ups a second.
const nanosleepMaxSleep = 20 * time.Millisecond

// nanosleepSource sleeps to absolute CLOCK_MONOTONIC deadlines with
// clock_nanosleep(TIMER_ABSTIME), which neither accumulates the drift of
// relative sleeps nor waits on the Go timer heap.
type nanosleepSource struct {
	base  time.Time
	mono0 int64 // CLOCK_MONOTONIC in nanoseconds at base
}

// newPlatformSource returns the clock_nanosleep source, or nil when the
// system call is not usable here (a seccomp filter, say): Run then falls
// back to the timer source.
func newPlatformSource() clockSource {
	var now unix.Timespec
	if err := unix.ClockGettime(unix.CLOCK_MONOTONIC, &now); err != nil {
		return nil
	}
	// A deadline in the past returns at once; this only checks the call.
	if err := unix.ClockNanosleep(unix.CLOCK_MONOTONIC, unix.TIMER_ABSTIME, &now, nil); err != nil {
		return nil
	}
	return &nanosleepSource{}
}

// begin reads time.Now and CLOCK_MONOTONIC back to back (time.Now on each
// side of the clock reading, taking the midpoint), so a Go deadline d maps
// to mono0 + d.Sub(base).
func (ns *nanosleepSource) begin() time.Time {
	var ts unix.Timespec
	before := time.Now()
	_ = unix.ClockGettime(unix.CLOCK_MONOTONIC, &ts) // checked in newPlatformSource
	after := time.Now()
	ns.base = before.Add(after.Sub(before) / 2)
	ns.mono0 = ts.Nano()
	return ns.base
}

func (ns *nanosleepSource) sleepUntil(ctx context.Context, wake time.Time, ok bool) {
	if !ok { // dispatch always gives this source a deadline; be safe
		wake = time.Now().Add(nanosleepMaxSleep)
	}
	ts := unix.NsecToTimespec(ns.mono0 + int64(wake.Sub(ns.base)))
	for {
		err := unix.ClockNanosleep(unix.CLOCK_MONOTONIC, unix.TIMER_ABSTIME, &ts, nil)
		if err != unix.EINTR {
			// nil, or an error newPlatformSource would have caught; in
			// either case return, and the loop recomputes its deadline.
			return
		}
		// Interrupted by a signal (the Go runtime sends SIGURG to preempt):
		// the deadline is absolute, so sleep again to the same instant.
		if ctx.Err() != nil {
			return
		}
	}
}

func (ns *nanosleepSource) wake()                   {}
func (ns *nanosleepSource) maxSleep() time.Duration { return nanosleepMaxSleep }

// claimThread locks the timing goroutine to its OS thread and sets the
// thread's timer slack to 1 ns (prctl PR_SET_TIMERSLACK; the default of
// 50 µs lets the kernel defer a wake-up by that much to batch timers). The
// release function restores the slack before unlocking, because the thread
// goes back to the Go runtime's pool.
func (ns *nanosleepSource) claimThread() (release func()) {
	runtime.LockOSThread()
	old, err := unix.PrctlRetInt(unix.PR_GET_TIMERSLACK, 0, 0, 0, 0)
	if err != nil {
		return runtime.UnlockOSThread
	}
	if err := unix.Prctl(unix.PR_SET_TIMERSLACK, 1, 0, 0, 0); err != nil {
		return runtime.UnlockOSThread
	}
	return func() {
		_ = unix.Prctl(unix.PR_SET_TIMERSLACK, uintptr(old), 0, 0, 0)
		runtime.UnlockOSThread()
	}
}
