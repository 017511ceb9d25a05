package daemon

import (
	"container/heap"
	"context"
	"errors"
	"fmt"
	"runtime"
	"sync"
	"sync/atomic"
	"time"
)

// Tick is one firing of a scheduled job.
//
// Tick k of a job is due at t0 + k·period exactly, where t0 is the job's
// first deadline: the schedule keeps its phase however late a tick starts.
// Seq is k. Ticks that were skipped — because the job's previous tick was
// still queued or running when they fell due, or because the scheduler woke
// a whole period or more after them — are never delivered late in a bunch;
// they are counted in the Missed field of the next tick that runs, so that
// Seq − Missed − 1 is the Seq of the previous delivered tick.
type Tick struct {
	Seq      uint64        // index k of the tick in its job's schedule
	Due      time.Time     // t0 + k·period, carrying a monotonic clock reading
	Start    time.Time     // when the job's function was called
	Lateness time.Duration // Start − Due, never negative
	Missed   uint64        // ticks skipped since the previous delivered one
}

// SchedulerOptions configures a [Scheduler]. The zero value means defaults.
type SchedulerOptions struct {
	// Workers is the number of goroutines that run the jobs' functions.
	// Zero means runtime.GOMAXPROCS(0), read when Run starts.
	Workers int

	// PortableTimer makes the scheduler sleep on a time.Timer even where the
	// system offers absolute monotonic sleeps (clock_nanosleep on Linux).
	// The timer is coarser under load; the option exists for systems where
	// the system call is filtered and for tests on the fake clock of
	// testing/synctest, which drives Go timers only.
	PortableTimer bool
}

// Scheduler runs any number of periodic jobs from one timing goroutine: the
// next deadline of every job sits in a min-heap, the timing goroutine sleeps
// until the earliest one and hands due ticks to a small pool of workers. One
// scheduler serves every estimator of a process.
//
// # Clocks
//
// All deadlines are computed on Go's monotonic clock, as offsets from a base
// time.Now() read when Run starts (the base carries its monotonic reading,
// and time.Time.Add and Sub keep using it). On Linux the timing goroutine is
// locked to its OS thread and sleeps with clock_nanosleep(CLOCK_MONOTONIC,
// TIMER_ABSTIME) until an absolute deadline; the deadline is translated from
// a Go time by reading CLOCK_MONOTONIC once next to the base (the pair is
// read back to back, so the translation is off by well under a microsecond,
// the same for every deadline; Go's own monotonic clock on Linux is
// CLOCK_MONOTONIC, so the two never drift apart). Elsewhere, or with
// PortableTimer, it waits on a time.Timer.
//
// # Lifecycle
//
// The constructor starts no goroutine. Jobs may be added and removed before
// and while Run runs. Jobs added before Run get t0 = the start of Run; a job
// added while running gets t0 = the time of Add (or, on Linux, the end of the
// scheduler's current sleep when that is later, so that a new job never
// starts with missed ticks). Run may be called once.
type Scheduler struct {
	opts SchedulerOptions

	mu        sync.Mutex
	jobs      jobHeap
	src       clockSource   // set by Run
	base      time.Time     // set by Run
	notBefore time.Duration // end of the current sleep of a source that cannot be woken, as an offset from base
	running   bool
	ran       bool

	queue workQueue
}

// NewScheduler returns a scheduler with no jobs. It starts no goroutine.
func NewScheduler(opts SchedulerOptions) *Scheduler {
	if opts.Workers < 0 {
		panic(fmt.Sprintf("daemon: NewScheduler with %d workers", opts.Workers))
	}
	return &Scheduler{opts: opts}
}

// job is one periodic function of a Scheduler.
type job struct {
	name   string
	period time.Duration
	fn     func(Tick)

	// Guarded by Scheduler.mu.
	index  int           // position in the heap, -1 when removed
	next   time.Duration // due time of tick seq, as an offset from the base
	seq    uint64
	missed uint64

	// busy is true from the moment a tick is queued until its function has
	// returned (or the tick was dropped). While busy is false only the
	// scheduler touches tick; while it is true only the worker that popped
	// the job does.
	busy atomic.Bool
	tick Tick

	mu      sync.Mutex // guards removed between remove and a worker about to start a tick
	removed bool
}

// Add schedules fn to be called every period, starting now (see the
// Scheduler's Lifecycle notes for the first deadline), and returns the
// function that removes it. After remove returns no new tick of the job
// starts; a tick already running finishes on its own. remove may be called
// any number of times and from any goroutine, fn included.
//
// fn runs on a worker goroutine, never twice at once for the same job; its
// first tick may run before Add returns (a job that removes itself must allow
// for that). name
// identifies the job in panics and debugging output. Add panics if period is
// not positive or fn is nil: both are programmer mistakes.
func (s *Scheduler) Add(name string, period time.Duration, fn func(Tick)) (remove func()) {
	if period <= 0 {
		panic(fmt.Sprintf("daemon: Scheduler.Add(%q) with period %v", name, period))
	}
	if fn == nil {
		panic(fmt.Sprintf("daemon: Scheduler.Add(%q) with a nil function", name))
	}
	j := &job{name: name, period: period, fn: fn}

	s.mu.Lock()
	if s.running {
		j.next = time.Since(s.base)
		if j.next < s.notBefore {
			j.next = s.notBefore
		}
	}
	heap.Push(&s.jobs, j)
	src := s.src
	s.mu.Unlock()
	if src != nil {
		src.wake()
	}

	return func() {
		j.mu.Lock()
		if j.removed {
			j.mu.Unlock()
			return
		}
		j.removed = true
		j.mu.Unlock()
		s.mu.Lock()
		if j.index >= 0 {
			heap.Remove(&s.jobs, j.index)
		}
		s.mu.Unlock()
	}
}

// Run runs the scheduler until ctx is done, then waits for the ticks that
// have started to finish and returns nil. Ticks queued but not started when
// ctx is done are dropped. Run returns an error only when called a second
// time.
func (s *Scheduler) Run(ctx context.Context) error {
	var src clockSource
	if !s.opts.PortableTimer {
		src = newPlatformSource()
	}
	if src == nil {
		src = newTimerSource()
	}
	defer src.claimThread()()

	s.mu.Lock()
	if s.ran {
		s.mu.Unlock()
		return errors.New("daemon: Scheduler.Run called twice")
	}
	s.ran, s.running = true, true
	s.src = src
	s.base = src.begin()
	s.mu.Unlock()

	workers := s.opts.Workers
	if workers == 0 {
		workers = runtime.GOMAXPROCS(0)
	}
	s.queue.open()
	var wg sync.WaitGroup
	for range workers {
		wg.Go(s.work)
	}

	for ctx.Err() == nil {
		wake, ok := s.dispatch(time.Now())
		src.sleepUntil(ctx, wake, ok)
	}

	s.queue.close()
	wg.Wait()
	s.mu.Lock()
	s.running = false
	s.mu.Unlock()
	return nil
}

// dispatch queues every tick due at or before now, counts the skipped ones,
// and returns the time the timing goroutine should wake next (ok is false
// when there is no job and the source can be woken by Add: it then waits for
// Add or ctx only).
func (s *Scheduler) dispatch(now time.Time) (wake time.Time, ok bool) {
	s.mu.Lock()
	defer s.mu.Unlock()
	off := now.Sub(s.base)
	for len(s.jobs) > 0 && s.jobs[0].next <= off {
		j := s.jobs[0]
		// Woke a whole period or more after the due time: skip those
		// ticks and run the latest one that is due, never a backlog.
		if behind := (off - j.next) / j.period; behind > 0 {
			j.seq += uint64(behind)
			j.missed += uint64(behind)
			j.next += behind * j.period
		}
		if j.busy.Load() {
			j.missed++ // the previous tick is still queued or running
		} else {
			j.busy.Store(true)
			j.tick = Tick{Seq: j.seq, Due: s.base.Add(j.next), Missed: j.missed}
			j.missed = 0
			s.queue.push(j)
		}
		j.seq++
		j.next += j.period
		heap.Fix(&s.jobs, 0)
	}
	limit := s.src.maxSleep()
	if limit == 0 { // a source that Add can wake
		if len(s.jobs) == 0 {
			return time.Time{}, false
		}
		return s.base.Add(s.jobs[0].next), true
	}
	// A source that cannot be woken early sleeps at most limit, so that
	// Run notices ctx, and Add schedules nothing before the end of the
	// sleep.
	next := off + limit
	if len(s.jobs) > 0 && s.jobs[0].next < next {
		next = s.jobs[0].next
	}
	s.notBefore = next
	return s.base.Add(next), true
}

// work runs queued ticks until the queue is closed.
func (s *Scheduler) work() {
	for {
		j, ok := s.queue.pop()
		if !ok {
			return
		}
		s.runTick(j)
	}
}

// runTick calls the job's function for its queued tick, unless the job has
// been removed since the tick was queued.
func (s *Scheduler) runTick(j *job) {
	j.mu.Lock()
	removed := j.removed
	j.mu.Unlock()
	if !removed {
		t := j.tick
		t.Start = time.Now()
		t.Lateness = t.Start.Sub(t.Due)
		j.fn(t)
	}
	j.busy.Store(false)
}

// clockSource is what the timing goroutine sleeps on.
type clockSource interface {
	// begin returns the base time of the schedule (a time.Now reading).
	begin() time.Time
	// sleepUntil returns at wake (if ok), when woken by wake(), or when ctx
	// is done, whichever comes first; a source with a maxSleep may also
	// return earlier.
	sleepUntil(ctx context.Context, wake time.Time, ok bool)
	// wake cuts a sleep short if the source can; Add calls it.
	wake()
	// maxSleep is the longest sleep of a source that cannot be woken early
	// (zero for one that can).
	maxSleep() time.Duration
	// claimThread prepares the calling goroutine to be the timing
	// goroutine (the Linux source locks it to its OS thread) and returns the
	// function that undoes it.
	claimThread() (release func())
}

// timerSource sleeps on a time.Timer, woken early by a channel.
type timerSource struct {
	t     *time.Timer
	wakeC chan struct{}
}

func newTimerSource() *timerSource {
	return &timerSource{wakeC: make(chan struct{}, 1)}
}

func (ts *timerSource) begin() time.Time { return time.Now() }

func (ts *timerSource) sleepUntil(ctx context.Context, wake time.Time, ok bool) {
	if !ok {
		select {
		case <-ts.wakeC:
		case <-ctx.Done():
		}
		return
	}
	d := time.Until(wake)
	if d <= 0 {
		return
	}
	if ts.t == nil {
		ts.t = time.NewTimer(d)
	} else {
		ts.t.Reset(d) // since Go 1.23 Reset drops a value not yet received
	}
	select {
	case <-ts.t.C:
	case <-ts.wakeC:
	case <-ctx.Done():
	}
	ts.t.Stop()
}

func (ts *timerSource) wake() {
	select {
	case ts.wakeC <- struct{}{}:
	default: // a wake-up is already pending
	}
}

func (ts *timerSource) maxSleep() time.Duration { return 0 }
func (ts *timerSource) claimThread() func()     { return func() {} }

// jobHeap orders jobs by their next deadline.
type jobHeap []*job

func (h jobHeap) Len() int           { return len(h) }
func (h jobHeap) Less(a, b int) bool { return h[a].next < h[b].next }
func (h jobHeap) Swap(a, b int) {
	h[a], h[b] = h[b], h[a]
	h[a].index = a
	h[b].index = b
}
func (h *jobHeap) Push(x any) {
	j := x.(*job)
	j.index = len(*h)
	*h = append(*h, j)
}
func (h *jobHeap) Pop() any {
	old := *h
	j := old[len(old)-1]
	old[len(old)-1] = nil
	j.index = -1
	*h = old[:len(old)-1]
	return j
}

// workQueue is a FIFO of jobs with a queued tick, as a growable ring. Each
// job is in it at most once (its busy flag), so it never holds more entries
// than there are jobs, and it stops growing once it has held that many.
type workQueue struct {
	mu     sync.Mutex
	cond   sync.Cond
	ring   []*job
	head   int // index of the oldest entry
	n      int // number of entries
	closed bool
}

func (q *workQueue) open() {
	q.mu.Lock()
	q.cond.L = &q.mu
	q.closed = false
	q.mu.Unlock()
}

func (q *workQueue) push(j *job) {
	q.mu.Lock()
	if q.n == len(q.ring) {
		grown := make([]*job, max(8, 2*len(q.ring)))
		for i := range q.n {
			grown[i] = q.ring[(q.head+i)%len(q.ring)]
		}
		q.ring, q.head = grown, 0
	}
	q.ring[(q.head+q.n)%len(q.ring)] = j
	q.n++
	q.mu.Unlock()
	q.cond.Signal()
}

// pop blocks until an entry is available or the queue is closed; ok is
// false once it is closed.
func (q *workQueue) pop() (j *job, ok bool) {
	q.mu.Lock()
	defer q.mu.Unlock()
	for q.n == 0 && !q.closed {
		q.cond.Wait()
	}
	if q.closed {
		return nil, false
	}
	j = q.ring[q.head]
	q.ring[q.head] = nil
	q.head = (q.head + 1) % len(q.ring)
	q.n--
	return j, true
}

// close wakes every waiting worker and drops the entries not yet taken.
func (q *workQueue) close() {
	q.mu.Lock()
	q.closed = true
	for q.n > 0 {
		q.ring[q.head].busy.Store(false)
		q.ring[q.head] = nil
		q.head = (q.head + 1) % len(q.ring)
		q.n--
	}
	q.mu.Unlock()
	q.cond.Broadcast()
}
