package daemon_test

import (
	"context"
	"errors"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"

	"surmise/daemon"
)

// violations collects the permission errors a client's server sends it.
type violations struct {
	mu   sync.Mutex
	errs []string
}

func (v *violations) handler(_ *nats.Conn, _ *nats.Subscription, err error) {
	v.mu.Lock()
	v.errs = append(v.errs, err.Error())
	v.mu.Unlock()
}

func (v *violations) has(s string) bool {
	v.mu.Lock()
	defer v.mu.Unlock()
	for _, e := range v.errs {
		if strings.Contains(strings.ToLower(e), "permissions violation") && strings.Contains(e, s) {
			return true
		}
	}
	return false
}

// The embedded server, tried from the outside as a local client would: an
// anonymous client may publish the plant's signals and read estimates, and
// is refused the control service, JetStream and other subjects; the local
// access files, owner-only, let a client of the same user do everything.
func TestEmbeddedServerLocked(t *testing.T) {
	run := t.TempDir()
	t.Setenv("XDG_RUNTIME_DIR", run)
	state := t.TempDir()
	spec := demoPlant(t, 50*time.Millisecond)
	r := startDaemon(t, daemon.Options{Plants: []daemon.PlantSpec{spec}, EmbeddedPort: -1, StateDir: state})

	// The files: where the doc says, mode 0600, naming the server's URL.
	if want := filepath.Join(run, "surmise"); filepath.Dir(r.ep.LocalAccess) != want {
		t.Fatalf("local access in %q, want under %q", r.ep.LocalAccess, want)
	}
	for _, dir := range []string{r.ep.LocalAccess, state} {
		for _, name := range []string{daemon.LocalURLFile, daemon.LocalUserFile} {
			fi, err := os.Stat(filepath.Join(dir, name))
			if err != nil {
				t.Fatal(err)
			}
			if fi.Mode().Perm() != 0o600 {
				t.Errorf("%s/%s: mode %v, want 0600", dir, name, fi.Mode().Perm())
			}
		}
	}
	found := daemon.FindLocal()
	if len(found) != 1 || found[0].URL != r.ep.BusURL {
		t.Fatalf("FindLocal = %+v, want the daemon's %s", found, r.ep.BusURL)
	}

	// Anonymous.
	var anonErrs violations
	anon, err := nats.Connect(r.ep.BusURL, nats.ErrorHandler(anonErrs.handler))
	if err != nil {
		t.Fatal(err)
	}
	defer anon.Close()
	estimates, err := anon.SubscribeSync(daemon.EstimateSubject(spec.Plant))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := estimates.NextMsg(5 * time.Second); err != nil {
		t.Errorf("anonymous client reads no estimate: %v", err)
	}
	for _, w := range append(spec.Plant.Inputs, spec.Plant.Outputs...) {
		anon.Publish(w.Subject, []byte("1"))
	}
	ctl := daemon.ControlSubject(spec.Plant.Name, daemon.VerbStatus)
	if _, err := anon.Request(ctl, nil, 2*time.Second); err == nil {
		t.Error("anonymous client was answered by the control service")
	}
	anon.Publish("pilot.somewhere.else", []byte("1"))
	if _, err := anon.SubscribeSync("surmise.>"); err != nil {
		t.Fatal(err)
	}
	js, _ := jetstream.New(anon)
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
	defer cancel()
	if _, err := js.AccountInfo(ctx); err == nil {
		t.Error("anonymous client may use JetStream")
	}
	checkFor(t, 5*time.Second, 20*time.Millisecond, func() error {
		for _, s := range []string{ctl, "pilot.somewhere.else", `"surmise.>"`} {
			if !anonErrs.has(s) {
				return fmt.Errorf("no permission violation for %s; errors %v", s, anonErrs.errs)
			}
		}
		return nil
	})
	// Samples refused with their reasons, from the outside: a payload of a
	// million bytes, and a time in year 1.
	out := spec.Plant.Outputs[0]
	anon.Publish(out.Subject, []byte(strings.Repeat("1", 1_000_000)))
	anon.Publish(out.Subject, []byte(`{"value": 60, "time": "0001-01-01T00:00:00Z"}`))
	checkFor(t, 5*time.Second, 20*time.Millisecond, func() error {
		for _, reason := range []string{"oversize", "time"} {
			v, _ := gathered(t, r.reg, "surmise_samples_rejected_total", map[string]string{"estimator": spec.Plant.Name, "signal": out.Signal, "reason": reason})
			if v != 1 {
				return fmt.Errorf("samples refused as %s: %v, want 1", reason, v)
			}
		}
		return nil
	})
	for _, w := range append(spec.Plant.Inputs, spec.Plant.Outputs...) {
		if anonErrs.has(w.Subject) {
			t.Errorf("anonymous publish on the wired subject %s refused", w.Subject)
		}
	}

	// The local user, from the files.
	opts, err := daemon.ClientOptions(daemon.BusOptions{UserFile: found[0].UserFile})
	if err != nil {
		t.Fatal(err)
	}
	local, err := nats.Connect(found[0].URL, opts...)
	if err != nil {
		t.Fatal(err)
	}
	defer local.Close()
	if _, err := local.Request(ctl, nil, 5*time.Second); err != nil {
		t.Errorf("local user's status request: %v", err)
	}
	ljs, _ := jetstream.New(local)
	lctx, lcancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer lcancel()
	if _, err := ljs.AccountInfo(lctx); err != nil {
		t.Errorf("local user's JetStream: %v", err)
	}

	// A wrong password is refused.
	if nc, err := nats.Connect(r.ep.BusURL, nats.UserInfo(daemon.LocalUser, "guess")); err == nil {
		nc.Close()
		t.Error("a guessed password was accepted")
	}

	// A clean stop removes the files.
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	if len(daemon.FindLocal()) != 0 {
		t.Error("local access files left after a clean stop")
	}
}

// Start-up refusals, tried from the outside: each fails fast with the
// reason, and leaves nothing listening.
func TestStartRefusals(t *testing.T) {
	t.Setenv("XDG_RUNTIME_DIR", t.TempDir())
	spec := demoPlant(t, 50*time.Millisecond)
	taken, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer taken.Close()
	port := taken.Addr().(*net.TCPAddr).Port

	// The store directory cannot be made: "nats" under the state
	// directory is a file.
	blocked := t.TempDir()
	if err := os.WriteFile(filepath.Join(blocked, "nats"), nil, 0o600); err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		name string
		opts daemon.Options
		want []string
	}{
		{"HTTP port in use", daemon.Options{EmbeddedPort: -1, Listen: taken.Addr().String()}, []string{"http server", "address already in use"}},
		{"NATS port in use", daemon.Options{EmbeddedPort: port}, []string{fmt.Sprintf("port %d", port), "not free"}},
		{"store unwritable", daemon.Options{EmbeddedPort: -1, StateDir: blocked}, []string{"embedded NATS server", "JetStream"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			o := c.opts
			o.Plants = []daemon.PlantSpec{spec}
			if o.Listen == "" {
				o.Listen = "127.0.0.1:0"
			}
			o.Registry = prometheus.NewPedanticRegistry()
			o.Logger = testLogger(t)
			o.Notify = func(string) error { return nil }
			d, err := daemon.New(o)
			if err != nil {
				t.Fatal(err)
			}
			ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
			defer cancel()
			start := time.Now()
			err = d.Run(ctx)
			took := time.Since(start)
			if err == nil {
				t.Fatal("started")
			}
			for _, w := range c.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q lacks %q", err, w)
				}
			}
			if took > 2*time.Second {
				t.Errorf("refused after %v, want at once", took)
			}
			if found := daemon.FindLocal(); len(found) != 0 {
				t.Errorf("local access files left: %+v", found)
			}
			if errors.Is(err, context.DeadlineExceeded) {
				t.Error("refusal by time-out")
			}
		})
	}
}

// connectLocal connects to a daemon's embedded server as its local user,
// with the access files it wrote, as `surmise record` does.
func connectLocal(t testing.TB, r *running) *nats.Conn {
	t.Helper()
	opts, err := daemon.ClientOptions(daemon.BusOptions{UserFile: filepath.Join(r.ep.LocalAccess, daemon.LocalUserFile)})
	if err != nil {
		t.Fatal(err)
	}
	nc, err := nats.Connect(r.ep.BusURL, opts...)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	return nc
}

func TestRedactURL(t *testing.T) {
	for _, c := range []struct{ in, want string }{
		{"nats://127.0.0.1:4222", "nats://127.0.0.1:4222"},
		{"nats://user:pw@a:4222", "nats://user:xxxxx@a:4222"},
		{"nats://token@a:4222", "nats://xxxxx@a:4222"},
		{"nats://a:1,tls://u:p@b:2", "nats://a:1,tls://u:xxxxx@b:2"},
		{"nats://u:p%zz@a", "(unparsable URL, hidden)"},
	} {
		if got := daemon.RedactURL(c.in); got != c.want {
			t.Errorf("RedactURL(%q) = %q, want %q", c.in, got, c.want)
		}
	}
}
