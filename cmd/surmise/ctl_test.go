package main

import (
	"context"
	"encoding/json"
	"errors"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/config"
	"surmise/daemon"
	"surmise/estimator"
)

// ctlDaemon is an in-process daemon running the invented cart of
// daemon/testdata/commission at 20 ms, with gains written by `surmise design`:
// "slow", a prediction-form placement at 0.995 and 0.99, active, and
// "kalman", the steady-state Kalman current form, as the candidate. A seeded
// simulation of the cart, started 3 m and 0.8 m/s away from the estimators'
// initial state, answers each estimate with the next samples.
type ctlDaemon struct {
	url, dir, gains, stateDir string
	gainsSeen                 atomic.Value // the gain set of the latest estimate
	shadowSeen                atomic.Int64 // shadow estimates received
}

func startCtlDaemon(t *testing.T) *ctlDaemon {
	t.Helper()
	c := &ctlDaemon{dir: t.TempDir(), stateDir: t.TempDir()}
	// The daemon's local access files go here, where ctl finds them.
	t.Setenv("XDG_RUNTIME_DIR", t.TempDir())
	src, err := os.ReadFile(filepath.Join("..", "..", "daemon", "testdata", "commission", "cart.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	plantFile := filepath.Join(c.dir, "cart.yaml")
	if err := os.WriteFile(plantFile, []byte(strings.Replace(string(src), "sample: 100ms", "sample: 20ms", 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, args := range [][]string{
		{"design", "--method", "poles", "--form", "prediction", "--poles", "0.995,0.99", "--name", "slow", "--time", "2026-05-04T10:00:00Z", plantFile},
		{"design", "--add", "--candidate", "--method", "kalman", "--form", "current", "--name", "kalman", "--time", "2026-05-04T10:00:00Z", plantFile},
	} {
		if _, stderr, code := cli(t, args...); code != 0 {
			t.Fatalf("surmise %s: exit %d\n%s", strings.Join(args, " "), code, stderr)
		}
	}
	plant, err := config.LoadPlant(plantFile)
	if err != nil {
		t.Fatal(err)
	}
	c.gains = plant.GainsPath
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		t.Fatal(err)
	}
	started := make(chan daemon.Endpoints, 1)
	d, err := daemon.New(daemon.Options{
		Plants:         []daemon.PlantSpec{{Plant: plant, Gains: gains}},
		EmbeddedPort:   -1,
		Listen:         "127.0.0.1:0",
		StateDir:       c.stateDir,
		MinDwell:       -1,
		ReloadDebounce: -1,
		Notify:         func(string) error { return nil },
		Started:        func(ep daemon.Endpoints) { started <- ep },
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		if err := d.Run(ctx); err != nil {
			t.Error(err)
		}
	}()
	t.Cleanup(func() { cancel(); wg.Wait() })
	select {
	case ep := <-started:
		c.url = ep.BusURL
	case <-time.After(20 * time.Second):
		t.Fatal("the daemon did not start")
	}

	// An anonymous client, as a plant bridge: it may publish the wired
	// signals and read the estimates.
	nc, err := nats.Connect(c.url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	sim := estimator.NewPlant(plant.Model, 99, []float64{4, 0.8})
	u, y := []float64{0}, []float64{0}
	k := 0
	var mu sync.Mutex
	feed := func(m *nats.Msg) {
		var est struct {
			Gains string `json:"gains"`
		}
		if json.Unmarshal(m.Data, &est) == nil {
			c.gainsSeen.Store(est.Gains)
		}
		mu.Lock()
		defer mu.Unlock()
		u[0] = 0.5 * float64(k%50) / 50
		k++
		sim.Step(u)
		sim.OutputTo(y)
		nc.Publish("bench.cart.force", []byte(strconv.FormatFloat(u[0], 'g', -1, 64)))
		nc.Publish("bench.cart.position", []byte(strconv.FormatFloat(y[0], 'g', -1, 64)))
	}
	if _, err := nc.Subscribe(daemon.EstimateSubject(plant), feed); err != nil {
		t.Fatal(err)
	}
	if _, err := nc.Subscribe(daemon.ShadowSubject(daemon.EstimateSubject(plant)), func(*nats.Msg) { c.shadowSeen.Add(1) }); err != nil {
		t.Fatal(err)
	}
	return c
}

// ctl runs `surmise ctl ARGS…` in-process, with no connection flag: it
// finds the daemon by its local access files.
func (c *ctlDaemon) ctl(t *testing.T, args ...string) (stdout, stderr string, code int) {
	t.Helper()
	return cli(t, append([]string{"ctl"}, args...)...)
}

// mustCtl runs ctl and wants exit status 0 and every one of wants in its
// output.
func (c *ctlDaemon) mustCtl(t *testing.T, wants []string, args ...string) string {
	t.Helper()
	out, errOut, code := c.ctl(t, args...)
	if code != 0 {
		t.Fatalf("ctl %s: exit %d\n%s%s", strings.Join(args, " "), code, out, errOut)
	}
	for _, w := range wants {
		if !strings.Contains(out, w) {
			t.Errorf("ctl %s: output lacks %q:\n%s", strings.Join(args, " "), w, out)
		}
	}
	return out
}

// status returns the daemon's status through `ctl --json`.
func (c *ctlDaemon) status(t *testing.T) daemon.StatusReply {
	t.Helper()
	out, errOut, code := c.ctl(t, "--json", "cart", "status")
	if code != 0 {
		t.Fatalf("ctl status: exit %d: %s", code, errOut)
	}
	var st daemon.StatusReply
	if err := json.Unmarshal([]byte(out), &st); err != nil {
		t.Fatalf("status %s: %v", out, err)
	}
	return st
}

// waitGains waits until the published estimates come from the set name.
func (c *ctlDaemon) waitGains(t *testing.T, name string) {
	t.Helper()
	deadline := time.Now().Add(20 * time.Second)
	for c.gainsSeen.Load() != name {
		if time.Now().After(deadline) {
			t.Fatalf("the estimates still come from %v, want %s", c.gainsSeen.Load(), name)
		}
		<-time.After(5 * time.Millisecond)
	}
}

// TestCtlEndToEnd commissions the cart through `surmise ctl` against an
// in-process daemon: status, an adopt-state promotion shown and then
// confirmed, roll back, load the gains file again to get the candidate
// back, a keep-state promotion, roll back, the refusals, a reset, and the
// audit trail they leave in the state directory.
func TestCtlEndToEnd(t *testing.T) {
	c := startCtlDaemon(t)

	// Let both lanes run on the cart's samples for a while.
	deadline := time.Now().Add(30 * time.Second)
	for {
		st := c.status(t)
		if st.Tick != nil && st.Shadow != nil && st.Tick.Seq >= 100 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("no shadow lane after 30 s: %+v", st)
		}
		<-time.After(20 * time.Millisecond)
	}
	if c.shadowSeen.Load() == 0 {
		t.Error("no estimate on the shadow subject")
	}
	c.mustCtl(t, []string{"active", "slow (prediction)", "candidate", "kalman (current)", "states", "position", "velocity"}, "cart", "status")

	// adopt-state, unconfirmed: the jump is shown, nothing changes.
	c.mustCtl(t, []string{"jump at tick", "position", "not applied", "--yes"}, "cart", "promote", "--adopt-state")
	if st := c.status(t); st.Active.Name != "slow" || st.Candidate == nil {
		t.Fatalf("an unconfirmed adopt-state changed the sets: %+v", st)
	}
	c.mustCtl(t, []string{"promoted (adopt-state)"}, "cart", "promote", "--adopt-state", "--yes")
	c.waitGains(t, "kalman")
	c.mustCtl(t, []string{"rolled back", "slow is active again"}, "cart", "rollback")
	c.waitGains(t, "slow")

	// The candidate comes back with the gains file.
	c.mustCtl(t, []string{"loaded", "candidate kalman started in shadow"}, "cart", "load", c.gains)
	c.mustCtl(t, []string{"promoted (keep-state)", "state carried over"}, "cart", "promote")
	c.waitGains(t, "kalman")
	c.mustCtl(t, []string{"rolled back"}, "cart", "rollback")
	c.waitGains(t, "slow")

	// Refusals: exit 1 with the daemon's reason.
	for _, r := range []struct {
		args []string
		want string
	}{
		{[]string{"cart", "promote"}, "cart promote refused (409): no candidate gain set runs in shadow"},
		{[]string{"cart", "reset", "--state", "speed=1"}, `refused (400): reset refused`},
		{[]string{"cart", "load", plantPathFor(c, "cart.yaml")}, "refused (422): gains file " + plantPathFor(c, "cart.yaml") + " (sent over the bus) refused\n  " + plantPathFor(c, "cart.yaml") + ":"},
		// No daemon runs it: every daemon listens on
		// surmise.control.*.status, and only the one that runs an
		// estimator replies.
		{[]string{"trolley", "status", "--timeout", "500ms"}, "no reply on surmise.control.trolley.status"},
	} {
		_, errOut, code := c.ctl(t, r.args...)
		if code != 1 || !strings.Contains(errOut, r.want) {
			t.Errorf("ctl %s: exit %d, stderr %q; want 1 and %q", strings.Join(r.args, " "), code, errOut, r.want)
		}
	}
	// A reset first shows the jump and changes nothing; --yes applies it.
	c.mustCtl(t, []string{"jump at tick", "reset", "not applied", "--yes"}, "cart", "reset", "--state", "position=5")
	c.mustCtl(t, []string{"reset:", "position=5", "velocity=0"}, "cart", "reset", "--state", "position=5", "--yes")

	// The audit trail: in the status and, line by line, in the state
	// directory.
	st := c.status(t)
	var actions []string
	for _, a := range st.Audit {
		actions = append(actions, a.Action+"/"+a.Transfer)
		if a.Trigger != daemon.TriggerControl || !strings.HasPrefix(a.Origin, "reply-subject: _INBOX.") || !strings.Contains(a.ClaimedBy, "@") {
			t.Errorf("audit entry %+v: want a control trigger, the reply subject as origin and user@host claimed", a)
		}
	}
	want := "promote/adopt-state rollback/ load/ promote/keep-state rollback/ reset/"
	if got := strings.Join(actions, " "); got != want {
		t.Errorf("audit actions %q, want %q", got, want)
	}
	data, err := os.ReadFile(filepath.Join(c.stateDir, daemon.AuditFile))
	if err != nil {
		t.Fatal(err)
	}
	if n := strings.Count(string(data), "\n"); n != 6 {
		t.Errorf("audit file has %d lines, want 6:\n%s", n, data)
	}
}

func plantPathFor(c *ctlDaemon, name string) string { return filepath.Join(c.dir, name) }

// TestCtlUsage checks the command-line mistakes, which need no daemon.
func TestCtlUsage(t *testing.T) {
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"ctl", "cart"}, "want an estimator and a verb"},
		{[]string{"ctl", "cart", "fly"}, `unknown verb "fly"`},
		{[]string{"ctl", "cart", "promote", "--yes"}, "--yes confirms --adopt-state"},
		{[]string{"ctl", "cart", "status", "--adopt-state"}, "--adopt-state does not go with status"},
		{[]string{"ctl", "cart", "load"}, "load wants one gains file"},
		{[]string{"ctl", "cart", "rollback", "now"}, "rollback takes no argument"},
		{[]string{"ctl", "cart", "reset", "--state", "position"}, `--state "position": want NAME=VALUE`},
		{[]string{"ctl", "cart", "reset", "--std", "position=NaN"}, "is not a finite number"},
		{[]string{"ctl", "cart", "load", "x.yaml", "--candidate", "a", "--no-candidate"}, "exclude each other"},
	} {
		_, stderr, code := cli(t, c.args...)
		if code != 2 || !strings.Contains(stderr, c.want) {
			t.Errorf("%s: exit %d, stderr %q; want 2 and %q", strings.Join(c.args, " "), code, stderr, c.want)
		}
	}
}

// TestRunSIGHUP runs the built binary on the cart and sends it SIGHUP: it
// does not die of it, it reloads (here: nothing changed, so an accepted
// reload that changes nothing, logged with trigger=signal), and SIGTERM then
// stops it with status 0.
func TestRunSIGHUP(t *testing.T) {
	if buildErr != nil {
		t.Fatal(buildErr)
	}
	dir := t.TempDir()
	src, err := os.ReadFile(filepath.Join("..", "..", "daemon", "testdata", "commission", "cart.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	plantFile := filepath.Join(dir, "cart.yaml")
	if err := os.WriteFile(plantFile, src, 0o644); err != nil {
		t.Fatal(err)
	}
	if _, stderr, code := cli(t, "design", "--method", "poles", "--form", "prediction", "--poles", "0.995,0.99", "--name", "slow", plantFile); code != 0 {
		t.Fatalf("design: %s", stderr)
	}
	stdout, stderr := newSyncBuffer(), newSyncBuffer()
	cmd := exec.Command(binary, "run", "--nats-port", "-1", "--listen", "127.0.0.1:0", "--state-dir", t.TempDir(), plantFile)
	cmd.Stdout, cmd.Stderr = stdout, stderr
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	exited := make(chan error, 1)
	go func() { exited <- cmd.Wait() }()
	defer func() {
		if cmd.ProcessState == nil {
			cmd.Process.Kill()
			<-exited
		}
	}()
	stdout.waitMatch(t, regexp.MustCompile(`(?m)^(bus):`), 30*time.Second)
	if err := cmd.Process.Signal(syscall.SIGHUP); err != nil {
		t.Fatal(err)
	}
	stderr.waitMatch(t, regexp.MustCompile(`(gains reloaded)" estimator=cart trigger=signal .*nothing to do`), 20*time.Second)
	if err := cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	select {
	case err := <-exited:
		if err != nil {
			t.Errorf("exit: %v\n%s", err, stderr.String())
		}
	case <-time.After(20 * time.Second):
		t.Fatal("no exit 20 s after SIGTERM")
	}
}

// FuzzCtlNameValues: NAME=VALUE lists parse to finite numbers under unique
// names, or are refused as usage errors.
func FuzzCtlNameValues(f *testing.F) {
	for _, s := range []string{"position=5", "a=1,b=-2e-3", "x", "=1", "v=NaN", "v=1e999", "a=1,a=2"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		list := strings.Split(s, ",")
		m, err := ctlNameValues("--state", list)
		if err != nil {
			if !errors.Is(err, errUsage) {
				t.Fatalf("%q: %v is not a usage error", s, err)
			}
			return
		}
		if len(m) != len(list) {
			t.Fatalf("%q: %d values from %d items", s, len(m), len(list))
		}
		for k, v := range m {
			if k == "" || math.IsNaN(v) || math.IsInf(v, 0) {
				t.Fatalf("%q: %q = %v", s, k, v)
			}
		}
	})
}

// The control service from the outside without the local user: refused by
// the server at once, with a message that says how to log in; with the
// daemon's user file handed over by path, answered.
func TestCtlNeedsCredentials(t *testing.T) {
	c := startCtlDaemon(t)
	start := time.Now()
	_, stderr, code := cli(t, "ctl", "--nats", c.url, "cart", "status")
	if code != 1 || !strings.Contains(stderr, "not allowed") || !strings.Contains(stderr, "--user-file") {
		t.Errorf("anonymous ctl: exit %d, %q; want 1 and a refusal naming --user-file", code, stderr)
	}
	if took := time.Since(start); took > 3*time.Second {
		t.Errorf("anonymous ctl refused after %v, want at once", took)
	}
	userFile := filepath.Join(c.stateDir, daemon.LocalUserFile)
	if _, stderr, code := cli(t, "ctl", "--nats", c.url, "--user-file", userFile, "cart", "status"); code != 0 {
		t.Errorf("ctl with the state directory's user file: exit %d, %s", code, stderr)
	}
}

// TestNISWords: a windowed NIS mean is said to be inside its band only
// when it is.
func TestNISWords(t *testing.T) {
	nan := math.NaN()
	for _, tc := range []struct {
		mean, lo, hi float64
		want         string
	}{
		{1.02, 0.81, 1.21, "NIS window mean 1.02, inside its 95 % band [0.81, 1.21]"},
		{0.0027, 0.47, 1.73, "NIS window mean 0.0027, below its 95 % band [0.47, 1.73]"},
		{3, 0.47, 1.73, "NIS window mean 3, above its 95 % band [0.47, 1.73]"},
		{nan, 0.47, 1.73, "no NIS window mean yet (or no S in this gain set)"},
		{1, nan, nan, "NIS window mean 1, no band yet"},
	} {
		if got := nisWords(tc.mean, tc.lo, tc.hi); got != tc.want {
			t.Errorf("nisWords(%v, %v, %v) = %q, want %q", tc.mean, tc.lo, tc.hi, got, tc.want)
		}
	}
}

// localUser reads the user and password the daemon of c wrote for local
// clients (nats.user in its state directory).
func localUser(t *testing.T, c *ctlDaemon) (user, password string) {
	t.Helper()
	user, password, err := daemon.ReadUserFile(filepath.Join(c.stateDir, daemon.LocalUserFile))
	if err != nil {
		t.Fatal(err)
	}
	return user, password
}
