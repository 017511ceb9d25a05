package daemon

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"surmise/config"
	"surmise/estimator"
)

// cmFixture is the invented cart of testdata/commission: two states, one
// input, the position measured, Ts = 100 ms.
const cmFixture = "testdata/commission/cart.yaml"

// cmPlantFile writes the cart's plant file into dir, with each old → new
// pair of repl replaced once, and returns its path. The gains file it names
// is dir/cart.gains.yaml.
func cmPlantFile(t testing.TB, dir string, repl ...string) string {
	t.Helper()
	data, err := os.ReadFile(cmFixture)
	if err != nil {
		t.Fatal(err)
	}
	s := string(data)
	for i := 0; i+1 < len(repl); i += 2 {
		if !strings.Contains(s, repl[i]) {
			t.Fatalf("the cart fixture has no %q to replace", repl[i])
		}
		s = strings.Replace(s, repl[i], repl[i+1], 1)
	}
	path := filepath.Join(dir, "cart.yaml")
	cmWriteAtomic(t, path, []byte(s))
	return path
}

// cmWriteAtomic replaces path by renaming a new file over it, as editors and
// surmise design do.
func cmWriteAtomic(t testing.TB, path string, data []byte) {
	t.Helper()
	tmp := path + ".tmp"
	if err := os.WriteFile(tmp, data, 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.Rename(tmp, path); err != nil {
		t.Fatal(err)
	}
}

func cmLoadPlant(t testing.TB, path string) *config.Plant {
	t.Helper()
	p, err := config.LoadPlant(path)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// cmSet designs one of the gain sets the tests use for md:
//
//	slow    prediction form, poles 0.995 and 0.99 placed: a slow observer
//	steady  current form, poles 0.9 and 0.85 placed
//	fast    current form, poles 0.6 and 0.5 placed
//	kalman  the time-varying Kalman filter with the plant's Q and R
func cmSet(t testing.TB, md *estimator.Model, name string) config.NamedSet {
	t.Helper()
	var gs *estimator.GainSet
	var err error
	method := "poles"
	switch name {
	case "slow":
		gs, err = estimator.DesignPlaced(md, estimator.Prediction, []complex128{0.995, 0.99}, false)
	case "steady":
		gs, err = estimator.DesignPlaced(md, estimator.Current, []complex128{0.9, 0.85}, false)
	case "fast":
		gs, err = estimator.DesignPlaced(md, estimator.Current, []complex128{0.6, 0.5}, false)
	case "kalman":
		gs, method = &estimator.GainSet{Form: estimator.Kalman, Q: md.Q, R: md.R}, "kalman"
	default:
		t.Fatalf("no test gain set %q", name)
	}
	if err != nil {
		t.Fatal(err)
	}
	gs.Name = name
	return config.NamedSet{Set: gs, Provenance: config.Provenance{Method: method, Tool: "daemon tests"}}
}

// cmGains encodes a gains file for the plant with the sets named (designed
// by cmSet), active and candidate ("" for none).
func cmGains(t testing.TB, plant *config.Plant, active, candidate string, sets ...string) []byte {
	t.Helper()
	g := config.NewGainsFile(plant)
	g.Active, g.Candidate = active, candidate
	for _, s := range sets {
		g.Sets = append(g.Sets, cmSet(t, plant.Model, s))
	}
	data, err := config.EncodeGains(g)
	if err != nil {
		t.Fatal(err)
	}
	return data
}

// cmLog is a concurrency-safe buffer for a test's log.
type cmLog struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (l *cmLog) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.buf.Write(p)
}

func (l *cmLog) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.buf.String()
}

// cmClock is a settable clock for the dwell time.
type cmClock struct {
	mu  sync.Mutex
	now time.Time
}

func (c *cmClock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.now
}

func (c *cmClock) Advance(d time.Duration) {
	c.mu.Lock()
	c.now = c.now.Add(d)
	c.mu.Unlock()
}

// cmRig is one estimator of the cart under a Commissioner, ticked in virtual
// time by the test, fed by a seeded simulation of the cart.
type cmRig struct {
	t         testing.TB
	dir       string
	plant     *config.Plant
	reg       *prometheus.Registry
	eng       *Engine
	c         *Commissioner
	audit     *Audit
	log       *cmLog
	clock     *cmClock
	est, cand *Estimate
	hasCand   bool
	sim       *estimator.Plant
	u, y      []float64
	k         int
}

// cmRigOptions are the knobs of newCMRig.
type cmRigOptions struct {
	repl              []string // replacements in the plant file
	active, candidate string
	sets              []string // default: slow, steady, fast, kalman
	dwell             time.Duration
	simX0             []float64 // the simulated cart's initial state (absolute); nil: the nominal
	seed              uint64
	// configMap lays the files out as Kubernetes mounts a ConfigMap:
	// dir/cm/cart.yaml → ..data/cart.yaml, ..data → a timestamped
	// directory (see cmConfigMapSwap).
	configMap bool
}

func newCMRig(t testing.TB, o cmRigOptions) *cmRig {
	t.Helper()
	dir := t.TempDir()
	path := cmPlantFile(t, dir, o.repl...)
	plant := cmLoadPlant(t, path)
	if o.sets == nil {
		o.sets = []string{"slow", "steady", "fast", "kalman"}
	}
	gainsData := cmGains(t, plant, o.active, o.candidate, o.sets...)
	if o.configMap {
		plantData, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		cm := filepath.Join(dir, "cm")
		cmConfigMapSwap(t, cm, map[string][]byte{"cart.yaml": plantData, "cart.gains.yaml": gainsData})
		for _, name := range []string{"cart.yaml", "cart.gains.yaml"} {
			if err := os.Symlink(filepath.Join("..data", name), filepath.Join(cm, name)); err != nil {
				t.Fatal(err)
			}
		}
		plant = cmLoadPlant(t, filepath.Join(cm, "cart.yaml"))
	} else {
		cmWriteAtomic(t, plant.GainsPath, gainsData)
	}
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		t.Fatal(err)
	}
	r := &cmRig{t: t, dir: dir, plant: plant, reg: prometheus.NewPedanticRegistry(), log: &cmLog{},
		clock: &cmClock{now: time.Date(2026, 5, 4, 10, 0, 0, 0, time.UTC)}}
	m := NewMetrics(r.reg)
	met := BindMetrics(m, plant, gains.Active)
	act, err := estimator.Prepare(plant.Model, gains.Set(gains.Active).Set, plant.Gate)
	if err != nil {
		t.Fatal(err)
	}
	r.eng = NewEngine(plant, act, EngineOptions{Metrics: met})
	r.audit = NewAudit(filepath.Join(dir, "state", AuditFile))
	r.c, err = NewCommissioner(CommissionerOptions{
		Plant: plant, Gains: gains, Engine: r.eng, Metrics: met, Audit: r.audit,
		Logger:   slog.New(slog.NewTextHandler(r.log, nil)),
		MinDwell: o.dwell, Now: r.clock.Now,
	})
	if err != nil {
		t.Fatal(err)
	}
	r.est, r.cand = r.eng.NewEstimate(), r.eng.NewEstimate()
	r.sim = estimator.NewPlant(plant.Model, o.seed, o.simX0)
	_, m1, p := plant.Model.Dims()
	r.u, r.y = make([]float64, m1), make([]float64, p)
	return r
}

// tick runs one tick at virtual time k·Ts: the simulated cart moves with a
// slowly varying force, its input and measurement are offered, the engine
// ticks and the commissioner sees both lanes.
func (r *cmRig) tick() {
	at := time.Unix(1_800_000_000, 0).Add(time.Duration(r.k) * 100 * time.Millisecond)
	r.u[0] = 0.5 * math.Sin(0.05*float64(r.k))
	r.sim.Step(r.u)
	r.sim.OutputTo(r.y)
	r.eng.Offer(0, r.u[0], at, at)
	r.eng.Offer(1, r.y[0], at, at)
	r.eng.Tick(at, r.est)
	r.hasCand = r.eng.CandidateTo(r.cand)
	if r.hasCand {
		r.c.observe(r.est, r.cand)
	} else {
		r.c.observe(r.est, nil)
	}
	r.k++
}

// metric returns the value of a series in the rig's registry.
func (r *cmRig) metric(name string, labels map[string]string) float64 {
	r.t.Helper()
	v, ok := engMetricValue(r.t, r.reg, name, labels)
	if !ok {
		r.t.Fatalf("no series %s%v", name, labels)
	}
	return v
}

func (r *cmRig) reloads(result string) float64 {
	return r.metric("surmise_gain_reloads_total", map[string]string{"estimator": "cart", "result": result})
}

// cmBadGains is a hand-written gains file for the cart with one prediction-
// form set "bad" whose gain is L = [[l1], [l2]] and S = [[s]] (no S when s
// is ""); the fingerprint is fp.
func cmBadGains(fp, l1, l2, s string) []byte {
	out := fmt.Sprintf("fingerprint: %s\nactive: bad\nsets:\n  - name: bad\n    form: prediction\n    gains:\n      - outputs: [position_pv]\n        L: [[%s], [%s]]\n", fp, l1, l2)
	if s != "" {
		out += fmt.Sprintf("        S: [[%s]]\n", s)
	}
	return []byte(out + "    provenance: {method: hand}\n")
}

// TestReloadRefusals puts a bad file on disk, asks for a reload as SIGHUP
// does, and checks that it is refused with its reason — logged with the
// file's name and the line, counted, in the last result — and that the
// running gains are untouched: the next tick still runs "slow".
func TestReloadRefusals(t *testing.T) {
	const zeros = "sha256:0000000000000000000000000000000000000000000000000000000000000000"
	position := regexp.MustCompile(`cart\.gains\.yaml:\d+`)
	cases := []struct {
		name     string
		repl     []string                               // plant file, for the rig
		gains    func(r *cmRig, fp string) []byte       // new gains file; nil: keep
		plant    func(r *cmRig) []string                // new plant file replacements; nil: keep
		code     string                                 // CommissionError.Code
		want     string                                 // in the reason or a detail
		position bool                                   // the log names file:line
		check    func(t *testing.T, e *CommissionError) // more checks
	}{
		{name: "bad YAML", gains: func(r *cmRig, fp string) []byte { return []byte("fingerprint: " + fp + "\nactive: [slow\n") },
			code: CodeInvalid, want: "cart.gains.yaml", position: true},
		{name: "fingerprint mismatch", gains: func(r *cmRig, fp string) []byte {
			return cmBadGains(zeros, "0.5", "0.1", "0.02")
		}, code: CodeInvalid, want: "does not match the plant's model", position: true},
		// A − L·C with L = [2.5, 0] is upper triangular with diagonal
		// 1 − 2.5 = −1.5 and 0.95: an eigenvalue of magnitude 1.5.
		{name: "unstable gains", gains: func(r *cmRig, fp string) []byte { return cmBadGains(fp, "2.5", "0", "1") },
			code: CodeInvalid, want: "magnitude 1.5", position: true},
		{name: "NaN", gains: func(r *cmRig, fp string) []byte { return cmBadGains(fp, ".nan", "0.1", "0.02") },
			code: CodeInvalid, want: "not a finite number", position: true},
		{name: "wrong dimension", gains: func(r *cmRig, fp string) []byte {
			return []byte(strings.Replace(string(cmBadGains(fp, "0.5", "0.1", "0.02")), "L: [[0.5], [0.1]]", "L: [[0.5], [0.1], [0.2]]", 1))
		}, code: CodeInvalid, want: "3×1, want 2×1", position: true},
		// With the outlier gate on, a fixed gain without S would run with
		// the gate silently off. (L = [0.5, 0.1] is stable: A − L·C has
		// trace 1.45 and determinant 0.485, eigenvalues 0.926 and 0.524.)
		{name: "gate without S", repl: []string{"gate: 0", "gate: 0.999"},
			gains: func(r *cmRig, fp string) []byte { return cmBadGains(fp, "0.5", "0.1", "") },
			code:  CodeInvalid, want: "needs it to compute NIS"},
		{name: "plant model changed", plant: func(r *cmRig) []string { return []string{"- [0, 0.95]", "- [0, 0.9]"} },
			code: CodeRefused, want: "restart needed", check: func(t *testing.T, e *CommissionError) {
				if !strings.Contains(e.Reason, "changed (model") || !strings.Contains(e.Reason, "restart needed") {
					t.Errorf("reason %q, want it to say the model changed and a restart is needed", e.Reason)
				}
			}},
		{name: "plant wiring changed", plant: func(r *cmRig) []string { return []string{"bench.cart.position", "bench.cart.pos2"} },
			code: CodeRefused, want: "changed (wiring): restart needed"},
		// Plant and gains change together: the gains (designed for the
		// new model, here just new) are not even read.
		{name: "plant and gains changed", plant: func(r *cmRig) []string { return []string{"- [0, 0.95]", "- [0, 0.9]"} },
			gains: func(r *cmRig, fp string) []byte { return cmGains(t, r.plant, "fast", "", "fast") },
			code:  CodeRefused, want: "the gains file was not reloaded"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := newCMRig(t, cmRigOptions{repl: c.repl, active: "slow"})
			r.tick()
			fp := config.Fingerprint(r.plant.Model)
			if c.plant != nil {
				cmPlantFile(t, r.dir, append(append([]string{}, c.repl...), c.plant(r)...)...)
			}
			if c.gains != nil {
				cmWriteAtomic(t, r.plant.GainsPath, c.gains(r, fp))
			}
			_, err := r.c.ReloadFromDisk(TriggerSignal, false)
			var ce *CommissionError
			if !errors.As(err, &ce) {
				t.Fatalf("reload: %v, want a refusal", err)
			}
			if ce.Code != c.code {
				t.Errorf("code %s, want %s (%v)", ce.Code, c.code, ce)
			}
			if !strings.Contains(ce.Error(), c.want) {
				t.Errorf("refusal %q does not say %q", ce.Error(), c.want)
			}
			if c.check != nil {
				c.check(t, ce)
			}
			log := r.log.String()
			if !strings.Contains(log, "refused") || !strings.Contains(log, "trigger=signal") {
				t.Errorf("log does not report the refusal:\n%s", log)
			}
			if c.position && !position.MatchString(log) {
				t.Errorf("log does not name the file and line:\n%s", log)
			}
			if got := r.reloads("refused"); got != 1 {
				t.Errorf("refused reloads %v, want 1", got)
			}
			if got := r.metric("surmise_gain_last_reload_success", map[string]string{"estimator": "cart"}); got != 0 {
				t.Errorf("last reload success %v, want 0", got)
			}
			st := r.c.Status()
			if st.LastReload == nil || st.LastReload.Result != "refused" || st.LastReload.Reason != ce.Reason {
				t.Errorf("status last reload %+v, want refused with %q", st.LastReload, ce.Reason)
			}
			if st.Active.Name != "slow" || st.Candidate != nil {
				t.Errorf("status active %v candidate %v, want slow and none", st.Active, st.Candidate)
			}
			r.tick()
			if r.est.Gains != "slow" {
				t.Errorf("after the refusal the engine runs %q, want slow", r.est.Gains)
			}
			if n := len(r.audit.Tail("", 10)); n != 0 {
				t.Errorf("%d audit entries after a refusal, want none", n)
			}
		})
	}
}

// TestReloadPlantCommentOnly: a plant file rewritten with only a comment
// changed is the same plant; the reload goes on to the gains.
func TestReloadPlantCommentOnly(t *testing.T) {
	r := newCMRig(t, cmRigOptions{active: "slow"})
	cmPlantFile(t, r.dir, "# An invented cart", "# A (still) invented cart")
	cmWriteAtomic(t, r.plant.GainsPath, cmGains(t, r.plant, "fast", "", "slow", "fast"))
	rep, err := r.c.ReloadFromDisk(TriggerSignal, false)
	if err != nil {
		t.Fatal(err)
	}
	if rep.Active.Name != "fast" || !rep.Changed {
		t.Errorf("reply %+v, want fast active and a change", rep)
	}
	if st := r.c.Status(); st.RestartNeeded != "" {
		t.Errorf("restart needed: %s", st.RestartNeeded)
	}
}

// TestReloadRestartNeededStays: once the plant file differs, every reload
// from disk is refused until it is put back.
func TestReloadRestartNeededStays(t *testing.T) {
	r := newCMRig(t, cmRigOptions{active: "slow"})
	cmPlantFile(t, r.dir, "- [0, 0.95]", "- [0, 0.9]")
	for i := 0; i < 2; i++ {
		if _, err := r.c.ReloadFromDisk(TriggerSignal, false); err == nil {
			t.Fatalf("reload %d accepted with a changed plant file", i)
		}
	}
	if st := r.c.Status(); !strings.Contains(st.RestartNeeded, "restart needed") {
		t.Errorf("status restart_needed %q", st.RestartNeeded)
	}
	// A control load is judged against the running model and goes on.
	if _, err := r.c.Load(cmGains(t, r.plant, "fast", "", "fast"), "control request", Selection{}, TriggerControl, Origin{Who: "test"}); err != nil {
		t.Errorf("control load refused while a restart is pending: %v", err)
	}
	cmPlantFile(t, r.dir) // put back
	if _, err := r.c.ReloadFromDisk(TriggerSignal, false); err != nil {
		t.Fatalf("reload with the plant file put back: %v", err)
	}
	if st := r.c.Status(); st.RestartNeeded != "" || st.Active.Name != "slow" {
		t.Errorf("status: restart %q, active %s; want none and slow (the file on disk)", st.RestartNeeded, st.Active.Name)
	}
	if got := r.reloads("refused"); got != 2 {
		t.Errorf("refused reloads %v, want 2", got)
	}
	if got := r.reloads("ok"); got != 2 {
		t.Errorf("ok reloads %v, want 2", got)
	}
}

// TestReloadAccepted loads a new active set and a candidate, then the same
// bytes again, and checks the audit trail, the metrics and the state
// carried over.
func TestReloadAccepted(t *testing.T) {
	r := newCMRig(t, cmRigOptions{active: "slow", seed: 7})
	for i := 0; i < 50; i++ {
		r.tick()
	}
	before := r.est.States[0].Value
	cmWriteAtomic(t, r.plant.GainsPath, cmGains(t, r.plant, "fast", "kalman", "slow", "fast", "kalman"))
	rep, err := r.c.ReloadFromDisk(TriggerSignal, false)
	if err != nil {
		t.Fatal(err)
	}
	if rep.Active.Name != "fast" || rep.Candidate == nil || rep.Candidate.Name != "kalman" || rep.Previous == nil || rep.Previous.Name != "slow" {
		t.Fatalf("reply %+v", rep)
	}
	r.tick()
	if r.est.Gains != "fast" || !r.hasCand || r.cand.Gains != "kalman" {
		t.Fatalf("after the reload: active %s, candidate %v %s", r.est.Gains, r.hasCand, r.cand.Gains)
	}
	// One tick of the fast current-form set from the slow set's estimate:
	// the estimate moves by what one correction makes it move, no more
	// (the measurement noise is 0.1 m; five of them bound the step).
	if d := math.Abs(r.est.States[0].Value - before); d > 0.5 {
		t.Errorf("the position estimate moved by %v over the swap", d)
	}
	if got := r.reloads("ok"); got != 1 {
		t.Errorf("ok reloads %v, want 1", got)
	}
	if got := r.metric("surmise_gains_info", map[string]string{"estimator": "cart", "gains": "fast", "form": "current", "fingerprint": config.Fingerprint(r.plant.Model)}); got != 1 {
		t.Errorf("gains info for fast %v, want 1", got)
	}
	tail := r.audit.Tail("cart", 10)
	if len(tail) != 1 || tail[0].Action != "load" || tail[0].Trigger != TriggerSignal ||
		tail[0].OldActive.Name != "slow" || tail[0].NewActive.Name != "fast" ||
		tail[0].NewCandidate == nil || tail[0].NewCandidate.Name != "kalman" || tail[0].SHA256 == "" {
		t.Errorf("audit %+v", tail)
	}
	// The same bytes again: accepted, nothing changes, nothing audited.
	rep, err = r.c.ReloadFromDisk(TriggerSignal, false)
	if err != nil || rep.Changed {
		t.Fatalf("second reload: %+v, %v", rep, err)
	}
	if n := len(r.audit.Tail("cart", 10)); n != 1 {
		t.Errorf("%d audit entries, want 1", n)
	}
	// The audit file holds the one line.
	data, err := os.ReadFile(r.audit.Path())
	if err != nil {
		t.Fatal(err)
	}
	if lines := strings.Count(string(data), "\n"); lines != 1 || !strings.Contains(string(data), `"new_active":{"name":"fast","form":"current"`) {
		t.Errorf("audit file:\n%s", data)
	}
}

// TestLoadSelection overrides the file's active and candidate sets.
func TestLoadSelection(t *testing.T) {
	r := newCMRig(t, cmRigOptions{active: "slow"})
	data := cmGains(t, r.plant, "slow", "kalman", "slow", "fast", "kalman")
	none := ""
	steady := "steady"
	cases := []struct {
		name       string
		sel        Selection
		wantActive string
		wantCand   string
		wantErr    string
	}{
		{"file as is", Selection{}, "slow", "kalman", ""},
		{"other active", Selection{Active: "fast"}, "fast", "kalman", ""},
		{"active is the file's candidate", Selection{Active: "kalman"}, "kalman", "", ""},
		{"no candidate", Selection{Candidate: &none}, "slow", "", ""},
		{"unknown set", Selection{Active: "steady"}, "", "", `"steady" is not in the gains file`},
		{"unknown candidate", Selection{Candidate: &steady}, "", "", `"steady" is not in the gains file`},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			rep, err := r.c.Load(data, "control request", c.sel, TriggerControl, Origin{})
			if c.wantErr != "" {
				if err == nil || !strings.Contains(err.Error(), c.wantErr) {
					t.Fatalf("error %v, want %q", err, c.wantErr)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			cand := ""
			if rep.Candidate != nil {
				cand = rep.Candidate.Name
			}
			if rep.Active.Name != c.wantActive || cand != c.wantCand {
				t.Errorf("active %s candidate %q, want %s %q", rep.Active.Name, cand, c.wantActive, c.wantCand)
			}
			g := r.c.Gains()
			if g.Active != c.wantActive || g.Candidate != c.wantCand || g.Set(g.Active) == nil {
				t.Errorf("gains in effect: active %s candidate %q", g.Active, g.Candidate)
			}
		})
	}
}

// cmConfigMapSwap updates the ConfigMap-style directory cm as the kubelet
// does: the files go into a new timestamped directory, a "..data_tmp"
// symlink to it is renamed over "..data", and the old directory is removed.
// The files users name (cm/cart.yaml → ..data/cart.yaml) never change.
func cmConfigMapSwap(t testing.TB, cm string, files map[string][]byte) {
	t.Helper()
	if err := os.MkdirAll(cm, 0o755); err != nil {
		t.Fatal(err)
	}
	old, _ := os.Readlink(filepath.Join(cm, "..data"))
	stamp := fmt.Sprintf("..2026_05_04_10_00_00.%d", time.Now().UnixNano())
	if err := os.Mkdir(filepath.Join(cm, stamp), 0o755); err != nil {
		t.Fatal(err)
	}
	for name, data := range files {
		if err := os.WriteFile(filepath.Join(cm, stamp, name), data, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	if err := os.Symlink(stamp, filepath.Join(cm, "..data_tmp")); err != nil {
		t.Fatal(err)
	}
	if err := os.Rename(filepath.Join(cm, "..data_tmp"), filepath.Join(cm, "..data")); err != nil {
		t.Fatal(err)
	}
	if old != "" {
		if err := os.RemoveAll(filepath.Join(cm, old)); err != nil {
			t.Fatal(err)
		}
	}
}

// TestDaemonReloads runs a whole Daemon on the cart (embedded server, no
// samples: it coasts) and changes its gains the two ways the daemon wires
// itself: a change in the watched directory, and Reload as SIGHUP calls it.
// Each accepted change lands in StateDir/gains-audit.jsonl.
func TestDaemonReloads(t *testing.T) {
	dir, state := t.TempDir(), t.TempDir()
	path := cmPlantFile(t, dir, "sample: 100ms", "sample: 20ms")
	plant := cmLoadPlant(t, path)
	cmWriteAtomic(t, plant.GainsPath, cmGains(t, plant, "slow", "kalman", "slow", "fast", "kalman"))
	gains, err := config.LoadGains(plant.GainsPath, plant)
	if err != nil {
		t.Fatal(err)
	}
	reg := prometheus.NewPedanticRegistry()
	started := make(chan Endpoints, 1)
	d, err := New(Options{
		Plants: []PlantSpec{{Plant: plant, Gains: gains}}, EmbeddedPort: -1, Listen: "127.0.0.1:0",
		StateDir: state, Registry: reg, Notify: func(string) error { return nil },
		Started: func(ep Endpoints) { started <- ep },
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- d.Run(ctx) }()
	defer func() {
		cancel()
		if err := <-done; err != nil {
			t.Error(err)
		}
	}()
	select {
	case <-started:
	case <-time.After(20 * time.Second):
		t.Fatal("the daemon did not start")
	}
	c := d.Estimators()[0].Commissioner()
	reloads := func(result string) float64 {
		v, _ := engMetricValue(t, reg, "surmise_gain_reloads_total", map[string]string{"estimator": "cart", "result": result})
		return v
	}
	cmPoll(t, 10*time.Second, func() bool { st := c.Status(); return st.Shadow != nil && st.Shadow.Gains == "kalman" }, "the shadow lane")

	// The watcher: an atomic rename of the gains file.
	cmWriteAtomic(t, plant.GainsPath, cmGains(t, plant, "fast", "kalman", "slow", "fast", "kalman"))
	cmPoll(t, 10*time.Second, func() bool { return c.Status().Active.Name == "fast" }, "the file change")
	if st := c.Status(); st.LastReload.Trigger != TriggerFile || reloads("ok") != 1 {
		t.Errorf("last reload %+v, %v ok", st.LastReload, reloads("ok"))
	}
	// Reload, as SIGHUP: the plant file changed, refused.
	cmPlantFile(t, dir, "sample: 100ms", "sample: 20ms", "bench.cart.force", "bench.cart.push")
	d.Reload(TriggerSignal)
	cmPoll(t, 10*time.Second, func() bool { return reloads("refused") >= 1 }, "the refusal")
	if st := c.Status(); !strings.Contains(st.RestartNeeded, "wiring") || st.Active.Name != "fast" {
		t.Errorf("status: restart %q, active %s", st.RestartNeeded, st.Active.Name)
	}
	if got := d.Estimators()[0].Gains(); got.Active != "fast" || got.Candidate != "kalman" {
		t.Errorf("the estimator's gains file in effect: active %s, candidate %s", got.Active, got.Candidate)
	}
	data, err := os.ReadFile(filepath.Join(state, AuditFile))
	if err != nil {
		t.Fatal(err)
	}
	if n := strings.Count(string(data), "\n"); n != 1 || !strings.Contains(string(data), `"trigger":"file"`) {
		t.Errorf("audit file:\n%s", data)
	}
	if d.AuditPath() != filepath.Join(state, AuditFile) {
		t.Errorf("AuditPath %q", d.AuditPath())
	}
}

// TestReloadChangeBeforeWatch: a gains file that changed between the
// daemon's reading it and the commissioner's start is reloaded at the first
// look, even though the disk does not change after that.
func TestReloadChangeBeforeWatch(t *testing.T) {
	r := newCMRig(t, cmRigOptions{active: "slow"})
	started, err := config.ParseGains(r.plant.GainsPath, cmGains(t, r.plant, "slow", "", "slow", "steady", "fast", "kalman"), r.plant)
	if err != nil {
		t.Fatal(err)
	}
	cmWriteAtomic(t, r.plant.GainsPath, cmGains(t, r.plant, "fast", "", "fast"))
	c, err := NewCommissioner(CommissionerOptions{Plant: r.plant, Gains: started, Engine: r.eng, MinDwell: -1})
	if err != nil {
		t.Fatal(err)
	}
	rep, err := c.ReloadFromDisk(TriggerFile, true)
	if err != nil || rep == nil || rep.Active.Name != "fast" {
		t.Fatalf("first look: %+v, %v; want fast loaded", rep, err)
	}
	if rep, err := c.ReloadFromDisk(TriggerFile, true); rep != nil || err != nil {
		t.Errorf("second look with nothing changed: %+v, %v", rep, err)
	}
}
