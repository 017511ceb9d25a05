package daemon

import (
	"context"
	"os"
	"path/filepath"
	"strconv"
	"sync"
	"sync/atomic"
	"testing"
	"time"
)

// watchRig runs a Watcher on a cart rig's files, calling the commissioner as
// the daemon does. Each look also reads the barrier file of the watched
// directory (see barrier).
type watchRig struct {
	*cmRig
	barrierPath string
	looks       atomic.Int64
	barrierSeen atomic.Int64
	cancel      context.CancelFunc
	wg          sync.WaitGroup
}

func newWatchRig(t *testing.T, configMap bool) *watchRig {
	r := &watchRig{cmRig: newCMRig(t, cmRigOptions{active: "slow", configMap: configMap})}
	r.barrierPath = filepath.Join(filepath.Dir(r.plant.GainsPath), "barrier")
	w := NewWatcher([]string{r.plant.Path, r.plant.GainsPath}, 0, func() {
		if data, err := os.ReadFile(r.barrierPath); err == nil {
			n, _ := strconv.Atoi(string(data))
			r.barrierSeen.Store(int64(n))
		}
		r.c.ReloadFromDisk(TriggerFile, true)
		r.looks.Add(1)
	}, nil)
	if got := w.Dirs(); len(got) != 1 {
		t.Fatalf("watching %v, want the one directory of both files", got)
	}
	ctx, cancel := context.WithCancel(context.Background())
	r.cancel = cancel
	r.wg.Add(1)
	go func() {
		defer r.wg.Done()
		if err := w.Run(ctx); err != nil {
			t.Error(err)
		}
	}()
	t.Cleanup(func() { cancel(); r.wg.Wait() })
	// The first look is made once the watch is in place.
	cmPoll(t, 10*time.Second, func() bool { return r.looks.Load() >= 1 }, "the watcher's first look")
	return r
}

// cmPoll waits, checking every few milliseconds, until cond holds or the
// deadline passes.
func cmPoll(t testing.TB, within time.Duration, cond func() bool, what string) {
	t.Helper()
	deadline := time.Now().Add(within)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("waited %v for %s", within, what)
		}
		<-time.After(5 * time.Millisecond)
	}
}

// barrier writes the n-th value to an unrelated file of the watched
// directory and waits for a look that read it. Events are handled in order
// and each one restarts the debounce, so that look came after every event of
// the changes made before the barrier.
func (r *watchRig) barrier(t *testing.T, n int) {
	t.Helper()
	if err := os.WriteFile(r.barrierPath, []byte(strconv.Itoa(n)), 0o644); err != nil {
		t.Fatal(err)
	}
	cmPoll(t, 10*time.Second, func() bool { return r.barrierSeen.Load() == int64(n) }, "a look after the barrier")
}

// TestWatchReloadsOnce changes the gains file the two ways that make no event
// with its name — an atomic rename over it, and a ConfigMap symlink swap —
// and checks each makes exactly one reload: the new set runs, one reload is
// counted, one entry audited, none refused; an unrelated file in the
// directory (the barrier) reloads nothing.
func TestWatchReloadsOnce(t *testing.T) {
	for _, configMap := range []bool{false, true} {
		name := "atomic rename"
		if configMap {
			name = "ConfigMap symlink swap"
		}
		t.Run(name, func(t *testing.T) {
			r := newWatchRig(t, configMap)
			r.barrier(t, 1)
			if got := r.reloads("ok"); got != 0 {
				t.Fatalf("%v reloads before any change", got)
			}
			for i, active := range []string{"fast", "steady"} {
				data := cmGains(t, r.plant, active, "", "slow", "steady", "fast")
				if configMap {
					plantData, err := os.ReadFile(r.plant.Path)
					if err != nil {
						t.Fatal(err)
					}
					cmConfigMapSwap(t, filepath.Dir(r.plant.Path), map[string][]byte{"cart.yaml": plantData, "cart.gains.yaml": data})
				} else {
					cmWriteAtomic(t, r.plant.GainsPath, data)
				}
				want := float64(i + 1)
				cmPoll(t, 10*time.Second, func() bool { return r.reloads("ok") >= want }, "the reload")
				r.barrier(t, i+2)
				if got := r.reloads("ok"); got != want {
					t.Errorf("change %d: %v reloads, want %v", i+1, got, want)
				}
				if got := r.reloads("refused"); got != 0 {
					t.Errorf("change %d: %v refused: %+v", i+1, got, r.c.Status().LastReload)
				}
				if st := r.c.Status(); st.Active.Name != active || st.LastReload.Trigger != TriggerFile {
					t.Errorf("change %d: active %s, last reload %+v", i+1, st.Active.Name, st.LastReload)
				}
				if n := len(r.audit.Tail("cart", 10)); n != i+1 {
					t.Errorf("change %d: %d audit entries", i+1, n)
				}
			}
		})
	}
}

// TestWatchPlantChange: a plant file changed on disk is refused once (restart
// needed), not at every later event in the directory.
func TestWatchPlantChange(t *testing.T) {
	r := newWatchRig(t, false)
	cmPlantFile(t, r.dir, "bench.cart.position", "bench.cart.pos2")
	cmPoll(t, 10*time.Second, func() bool { return r.reloads("refused") >= 1 }, "the refusal")
	r.barrier(t, 1)
	r.barrier(t, 2)
	if got := r.reloads("refused"); got != 1 {
		t.Errorf("%v refusals, want 1", got)
	}
	if st := r.c.Status(); st.RestartNeeded == "" || st.Active.Name != "slow" {
		t.Errorf("status: restart %q, active %s", st.RestartNeeded, st.Active.Name)
	}
}
