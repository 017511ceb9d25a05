//go:build !linux

package daemon

// newPlatformSource returns nil: outside Linux the scheduler sleeps on a
// time.Timer.
func newPlatformSource() clockSource { return nil }
