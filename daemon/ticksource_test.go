package daemon

import (
	"context"
	"sync"
	"testing"
	"testing/synctest"
	"time"
)

// tickLog records the ticks of one job.
type tickLog struct {
	mu    sync.Mutex
	ticks []Tick
}

func (l *tickLog) add(t Tick) {
	l.mu.Lock()
	l.ticks = append(l.ticks, t)
	l.mu.Unlock()
}

func (l *tickLog) get() []Tick {
	l.mu.Lock()
	defer l.mu.Unlock()
	return append([]Tick(nil), l.ticks...)
}

// startScheduler runs s in a goroutine and returns a function that stops it
// and returns Run's error.
func startScheduler(s *Scheduler) (stop func() error) {
	ctx, cancel := context.WithCancel(context.Background())
	errc := make(chan error, 1)
	go func() { errc <- s.Run(ctx) }()
	return func() error {
		cancel()
		return <-errc
	}
}

// want is the expected tick k of a job whose t0 is start: all times are
// exact on the fake clock of testing/synctest, where time moves only when
// every goroutine of the bubble is blocked.
type want struct {
	seq    uint64
	start  time.Duration // offset of Start from the job's t0
	late   time.Duration
	missed uint64
}

func checkTicks(t *testing.T, got []Tick, t0 time.Time, period time.Duration, wants []want) {
	t.Helper()
	if len(got) != len(wants) {
		t.Fatalf("got %d ticks, want %d: %+v", len(got), len(wants), got)
	}
	for i, w := range wants {
		g := got[i]
		due := t0.Add(time.Duration(w.seq) * period) // t0 + k·period, the definition
		if g.Seq != w.seq || !g.Due.Equal(due) || g.Start.Sub(t0) != w.start ||
			g.Lateness != w.late || g.Missed != w.missed {
			t.Errorf("tick %d = {Seq %d, Due +%v, Start +%v, Lateness %v, Missed %d}, want {Seq %d, Due +%v, Start +%v, Lateness %v, Missed %d}",
				i, g.Seq, g.Due.Sub(t0), g.Start.Sub(t0), g.Lateness, g.Missed,
				w.seq, due.Sub(t0), w.start, w.late, w.missed)
		}
	}
}

func TestSchedulerExactDueTimes(t *testing.T) {
	synctest.Test(t, func(t *testing.T) {
		s := NewScheduler(SchedulerOptions{Workers: 2, PortableTimer: true})
		var a, b tickLog
		s.Add("a", 10*time.Millisecond, a.add)
		s.Add("b", 15*time.Millisecond, b.add)
		start := time.Now()
		stop := startScheduler(s)
		time.Sleep(45 * time.Millisecond)
		synctest.Wait()
		if err := stop(); err != nil {
			t.Fatalf("Run = %v", err)
		}
		// Both jobs added before Run: t0 = the start of Run, tick k at
		// t0 + k·period, started on time on the fake clock.
		checkTicks(t, a.get(), start, 10*time.Millisecond, []want{
			{0, 0, 0, 0}, {1, 10 * time.Millisecond, 0, 0}, {2, 20 * time.Millisecond, 0, 0},
			{3, 30 * time.Millisecond, 0, 0}, {4, 40 * time.Millisecond, 0, 0},
		})
		checkTicks(t, b.get(), start, 15*time.Millisecond, []want{
			{0, 0, 0, 0}, {1, 15 * time.Millisecond, 0, 0}, {2, 30 * time.Millisecond, 0, 0},
			{3, 45 * time.Millisecond, 0, 0},
		})
	})
}

func TestSchedulerSkipsTicksWhileBusy(t *testing.T) {
	synctest.Test(t, func(t *testing.T) {
		const period = 10 * time.Millisecond
		s := NewScheduler(SchedulerOptions{Workers: 2, PortableTimer: true})
		var l tickLog
		s.Add("slow", period, func(tk Tick) {
			l.add(tk)
			if tk.Seq == 1 {
				time.Sleep(25 * time.Millisecond) // tick 1 runs from 10 ms to 35 ms
			}
		})
		start := time.Now()
		stop := startScheduler(s)
		time.Sleep(65 * time.Millisecond)
		synctest.Wait()
		if err := stop(); err != nil {
			t.Fatalf("Run = %v", err)
		}
		// Ticks 2 (20 ms) and 3 (30 ms) fall due while tick 1 runs: they are
		// skipped and counted on tick 4, which starts on time at 40 ms (the
		// phase is kept; nothing is bunched at 35 ms).
		checkTicks(t, l.get(), start, period, []want{
			{0, 0, 0, 0},
			{1, 10 * time.Millisecond, 0, 0},
			{4, 40 * time.Millisecond, 0, 2},
			{5, 50 * time.Millisecond, 0, 0},
			{6, 60 * time.Millisecond, 0, 0},
		})
	})
}

func TestSchedulerLateWorkerKeepsPhase(t *testing.T) {
	synctest.Test(t, func(t *testing.T) {
		// One worker shared by two jobs: while "hog" runs from 20 ms to
		// 42 ms, the tick of "victim" due at 25 ms waits in the queue and
		// starts late; its Due stays on the grid, its lateness is measured
		// from it, and the tick due at 35 ms, while the late one is still
		// queued, is skipped.
		const period = 10 * time.Millisecond
		s := NewScheduler(SchedulerOptions{Workers: 1, PortableTimer: true})
		var victim tickLog
		s.Add("hog", 20*time.Millisecond, func(tk Tick) {
			if tk.Seq == 1 {
				time.Sleep(22 * time.Millisecond)
			}
		})
		start := time.Now()
		stop := startScheduler(s)
		time.Sleep(5 * time.Millisecond)
		s.Add("victim", period, victim.add) // added while running: t0 = 5 ms
		time.Sleep(45 * time.Millisecond)   // until 50 ms
		synctest.Wait()
		if err := stop(); err != nil {
			t.Fatalf("Run = %v", err)
		}
		checkTicks(t, victim.get(), start.Add(5*time.Millisecond), period, []want{
			{0, 0, 0, 0},
			{1, 10 * time.Millisecond, 0, 0},
			{2, 37 * time.Millisecond, 17 * time.Millisecond, 0}, // due 25 ms, started 42 ms
			{4, 40 * time.Millisecond, 0, 1},                     // tick 3 (35 ms) skipped
		})
	})
}

func TestSchedulerAddWhileRunning(t *testing.T) {
	synctest.Test(t, func(t *testing.T) {
		s := NewScheduler(SchedulerOptions{PortableTimer: true})
		start := time.Now()
		stop := startScheduler(s)
		time.Sleep(13 * time.Millisecond)
		var l tickLog
		remove := s.Add("late", 10*time.Millisecond, l.add)
		time.Sleep(25 * time.Millisecond) // until 38 ms
		remove()
		time.Sleep(30 * time.Millisecond)
		synctest.Wait()
		if err := stop(); err != nil {
			t.Fatalf("Run = %v", err)
		}
		// t0 is the time of Add (13 ms): ticks at 13, 23, 33; none after
		// remove at 38 ms.
		t0 := start.Add(13 * time.Millisecond)
		checkTicks(t, l.get(), t0, 10*time.Millisecond, []want{
			{0, 0, 0, 0},
			{1, 10 * time.Millisecond, 0, 0},
			{2, 20 * time.Millisecond, 0, 0},
		})
	})
}

func TestSchedulerRemove(t *testing.T) {
	synctest.Test(t, func(t *testing.T) {
		const period = 10 * time.Millisecond
		s := NewScheduler(SchedulerOptions{Workers: 2, PortableTimer: true})
		var keep, self, never tickLog
		s.Add("keep", period, keep.add)
		var removeSelf func()
		removeSelf = s.Add("self", period, func(tk Tick) {
			self.add(tk)
			if tk.Seq == 2 {
				removeSelf() // from inside its own tick
				removeSelf() // idempotent
			}
		})
		removeNever := s.Add("never", period, never.add)
		removeNever() // before Run: never ticks
		start := time.Now()
		stop := startScheduler(s)
		time.Sleep(55 * time.Millisecond)
		synctest.Wait()
		if err := stop(); err != nil {
			t.Fatalf("Run = %v", err)
		}
		if n := len(never.get()); n != 0 {
			t.Errorf("job removed before Run ticked %d times", n)
		}
		checkTicks(t, self.get(), start, period, []want{
			{0, 0, 0, 0}, {1, 10 * time.Millisecond, 0, 0}, {2, 20 * time.Millisecond, 0, 0},
		})
		if n := len(keep.get()); n != 6 { // 0, 10, 20, 30, 40, 50 ms
			t.Errorf("remaining job ticked %d times, want 6", n)
		}
	})
}

func TestSchedulerRunWaitsForInFlightTick(t *testing.T) {
	synctest.Test(t, func(t *testing.T) {
		s := NewScheduler(SchedulerOptions{PortableTimer: true})
		started := make(chan struct{})
		var finished time.Time
		s.Add("long", time.Second, func(Tick) {
			close(started)
			time.Sleep(50 * time.Millisecond)
			finished = time.Now()
		})
		start := time.Now()
		ctx, cancel := context.WithCancel(context.Background())
		errc := make(chan error, 1)
		go func() { errc <- s.Run(ctx) }()
		<-started
		time.Sleep(5 * time.Millisecond)
		cancel()
		if err := <-errc; err != nil {
			t.Fatalf("Run = %v", err)
		}
		returned := time.Now()
		if finished.IsZero() || returned.Before(finished) {
			t.Fatalf("Run returned at +%v, before the in-flight tick finished (%v)", returned.Sub(start), finished)
		}
		if got := returned.Sub(start); got != 50*time.Millisecond {
			t.Errorf("Run returned at +%v, want +50ms (the end of the tick)", got)
		}
		if err := s.Run(context.Background()); err == nil {
			t.Error("second Run returned nil, want an error")
		}
	})
}

// TestSchedulerCatchUp checks the dispatch step alone: a timing goroutine
// that wakes whole periods after a deadline runs only the latest due tick and
// counts the others.
func TestSchedulerCatchUp(t *testing.T) {
	const period = 10 * time.Millisecond
	base := time.Now()
	tests := []struct {
		name     string
		wakeAt   time.Duration
		wantSeq  uint64
		wantMiss uint64
	}{
		{"on time", 0, 0, 0},
		{"late within a period", 9 * time.Millisecond, 0, 0},
		{"exactly one period late", 10 * time.Millisecond, 1, 1},
		{"three and a half periods late", 35 * time.Millisecond, 3, 3},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			s := newTestScheduler(base)
			var got []Tick
			s.Add("j", period, func(tk Tick) { got = append(got, tk) })
			s.dispatch(base.Add(tc.wakeAt))
			s.drain()
			if len(got) != 1 {
				t.Fatalf("got %d ticks, want 1", len(got))
			}
			wantDue := base.Add(time.Duration(tc.wantSeq) * period)
			if got[0].Seq != tc.wantSeq || got[0].Missed != tc.wantMiss || !got[0].Due.Equal(wantDue) {
				t.Errorf("tick = {Seq %d, Missed %d, Due +%v}, want {%d, %d, +%v}",
					got[0].Seq, got[0].Missed, got[0].Due.Sub(base), tc.wantSeq, tc.wantMiss, wantDue.Sub(base))
			}
			// The next deadline stays on the grid.
			if wake, ok := s.dispatch(base.Add(tc.wakeAt)); !ok || !wake.Equal(base.Add(time.Duration(tc.wantSeq+1)*period)) {
				t.Errorf("next wake = +%v, want +%v", wake.Sub(base), time.Duration(tc.wantSeq+1)*period)
			}
		})
	}
}

// newTestScheduler returns a scheduler set up as Run would, without its
// goroutines, so that tests can drive dispatch and runTick directly.
func newTestScheduler(base time.Time) *Scheduler {
	s := NewScheduler(SchedulerOptions{PortableTimer: true})
	s.src = newTimerSource()
	s.base = base
	s.queue.open()
	return s
}

// drain runs every queued tick on the calling goroutine.
func (s *Scheduler) drain() {
	for {
		s.queue.mu.Lock()
		n := s.queue.n
		s.queue.mu.Unlock()
		if n == 0 {
			return
		}
		j, _ := s.queue.pop()
		s.runTick(j)
	}
}

func TestSchedulerTickAllocatesNothing(t *testing.T) {
	const period = time.Millisecond
	base := time.Now()
	s := newTestScheduler(base)
	for range 100 {
		s.Add("j", period, func(Tick) {})
	}
	now := base
	allocs := testing.AllocsPerRun(1000, func() {
		s.dispatch(now) // 100 jobs due: heap fixes, queueing
		s.drain()       // and running them
		now = now.Add(period)
	})
	if allocs != 0 {
		t.Errorf("one tick of 100 jobs allocates %v times, want 0", allocs)
	}
}

func TestSchedulerAddPanics(t *testing.T) {
	s := NewScheduler(SchedulerOptions{})
	for _, tc := range []struct {
		name   string
		period time.Duration
		fn     func(Tick)
	}{
		{"zero period", 0, func(Tick) {}},
		{"negative period", -time.Second, func(Tick) {}},
		{"nil function", time.Second, nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			defer func() {
				if recover() == nil {
					t.Error("Add did not panic")
				}
			}()
			s.Add("j", tc.period, tc.fn)
		})
	}
}

func ExampleScheduler() {
	s := NewScheduler(SchedulerOptions{})
	ctx, cancel := context.WithCancel(context.Background())
	remove := s.Add("hot-water-loop", 10*time.Millisecond, func(t Tick) {
		if t.Missed > 0 {
			// count t.Missed overruns
		}
		if t.Seq == 3 {
			cancel() // stop after four ticks
		}
	})
	defer remove()
	_ = s.Run(ctx) // returns once ctx is done and the running tick has finished
}

// cappedSource stands for a source that cannot be woken early, like the
// Linux one, for tests of dispatch alone.
type cappedSource struct{ timerSource }

func (cappedSource) maxSleep() time.Duration { return 20 * time.Millisecond }

func TestSchedulerAddDuringUninterruptibleSleep(t *testing.T) {
	// A base in the future makes time.Since(base) negative, so that the
	// test does not depend on how fast it runs: only notBefore counts.
	base := time.Now().Add(time.Hour)
	s := newTestScheduler(base)
	s.src = &cappedSource{}
	s.running = true

	// No job: the source sleeps its longest, 20 ms from now (5 ms).
	wake, ok := s.dispatch(base.Add(5 * time.Millisecond))
	if !ok || !wake.Equal(base.Add(25*time.Millisecond)) {
		t.Fatalf("idle wake = +%v, %v; want +25ms", wake.Sub(base), ok)
	}
	// A job added during that sleep starts when it ends, not before: its
	// first tick is not missed for a sleep it could not interrupt.
	var got []Tick
	s.Add("j", time.Millisecond, func(tk Tick) { got = append(got, tk) })
	s.dispatch(base.Add(25 * time.Millisecond))
	s.drain()
	if len(got) != 1 || got[0].Seq != 0 || got[0].Missed != 0 || !got[0].Due.Equal(base.Add(25*time.Millisecond)) {
		t.Fatalf("first tick = %+v, want Seq 0, Missed 0, due at +25ms", got)
	}
	// With a 1 ms job the sleeps are 1 ms long again.
	if wake, _ := s.dispatch(base.Add(25 * time.Millisecond)); !wake.Equal(base.Add(26 * time.Millisecond)) {
		t.Errorf("next wake = +%v, want +26ms", wake.Sub(base))
	}
}
