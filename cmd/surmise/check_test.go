package main

import (
	"encoding/json"
	"math"
	"math/cmplx"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/daemon/check"
)

// TestCheckGolden compares check's report, text and JSON, with the golden
// files (regression snapshots: see golden), and its exit status with the
// verdict. TestCheckAgainstScipy checks the numbers in them.
func TestCheckGolden(t *testing.T) {
	for _, tc := range []struct {
		golden   string
		args     []string
		wantCode int
	}{
		// The demo plant with its committed gains file (found through the plant).
		{"check-hotwater-loop.txt", []string{"check", plantPath("hotwater-loop.yaml")}, 0},
		{"check-hotwater-loop.json", []string{"check", "--json", plantPath("hotwater-loop.yaml")}, 0},
		// The reference double integrator, no gains file yet.
		{"check-double-integrator.txt", []string{"check", plantPath("cmd:double-integrator.yaml")}, 0},
		// The invented undetectable plant.
		{"check-unobservable.txt", []string{"check", plantPath("unobservable.yaml")}, 1},
		{"check-unobservable.json", []string{"check", plantPath("unobservable.yaml"), "--json"}, 1},
	} {
		t.Run(tc.golden, func(t *testing.T) {
			out, errOut, code := cli(t, tc.args...)
			if code != tc.wantCode {
				t.Errorf("exit status %d, want %d; stderr: %s", code, tc.wantCode, errOut)
			}
			if errOut != "" {
				t.Errorf("unexpected stderr: %s", errOut)
			}
			golden(t, tc.golden, out)
		})
	}
}

func checkJSON(t *testing.T, args ...string) (*check.Report, int) {
	t.Helper()
	out, errOut, code := cli(t, append([]string{"check", "--json"}, args...)...)
	var rep check.Report
	if err := json.Unmarshal([]byte(out), &rep); err != nil {
		t.Fatalf("check --json %v printed no JSON report (%v); stderr: %s", args, err, errOut)
	}
	return &rep, code
}

// TestCheckFirstOrderLag checks the reported discretisation, noise and time
// constant of a first-order lag against its closed forms (SOURCES.md: first-order-lag).
func TestCheckFirstOrderLag(t *testing.T) {
	rep, code := checkJSON(t, plantPath("cmd:first-order-lag.yaml"))
	if code != 0 || !rep.CanRun {
		t.Fatalf("exit status %d, can_run %v, problems %q", code, rep.CanRun, rep.Problems)
	}
	const tol = 1e-9 // the report rounds to ten significant digits
	near := func(what string, got, want float64) {
		t.Helper()
		if math.Abs(got-want) > tol*math.Max(1, math.Abs(want)) {
			t.Errorf("%s = %.12g, want %.12g", what, got, want)
		}
	}
	// τ = 2, K = 3, T = 0.5: Φ, Γ and Q_d (SOURCES.md: first-order-lag, recomputed).
	near("A", rep.Model.A[0][0], 0.7788007830714049)
	near("B", rep.Model.B[0][0], 0.6635976507857854)
	near("process std per sample", rep.Noise.ProcessStd[0], math.Sqrt(0.3934693402873666))
	near("process density std", rep.Noise.ProcessDensityStd[0], 1)
	// The time constant is τ = 2 s (closed form: −T/ln e^{−T/τ} = τ; SOURCES.md: first-order-lag).
	if len(rep.Eigenvalues) != 1 || rep.Eigenvalues[0].TimeConstantSeconds == nil {
		t.Fatalf("eigenvalues %+v, want one with a time constant", rep.Eigenvalues)
	}
	near("time constant", *rep.Eigenvalues[0].TimeConstantSeconds, 2)
	if e := rep.Eigenvalues[0]; e.Kind != "stable" || e.PeriodSeconds != nil {
		t.Errorf("eigenvalue %+v, want a stable, non-oscillating mode", e)
	}
	if rep.Model.Time != "continuous" || rep.Model.ProcessNoise != "continuous" || rep.Model.SampleSeconds != 0.5 {
		t.Errorf("model origin %q, noise %q, Ts %v; want continuous, continuous, 0.5", rep.Model.Time, rep.Model.ProcessNoise, rep.Model.SampleSeconds)
	}
	if w := rep.Wiring[0]; w.Signal != "power" || w.Kind != "input" || w.MaxAgeSeconds != 2 || w.Nominal != 2 || w.Range != nil {
		t.Errorf("input wiring %+v", w)
	}
	if w := rep.Wiring[1]; w.Signal != "temp_pv" || w.MaxAgeSeconds != 1.5 { // default: 3 sample periods (config.DefaultMaxAgeTicks)
		t.Errorf("output wiring %+v", w)
	}
}

// TestCheckTimeConstantsDemo checks the demo plant's reported time constants
// against the continuous-time eigenvalues of its A: zero-order hold maps
// λ_c to e^{λ_c·Ts}, so −Ts/ln|λ| = −1/Re λ_c (SOURCES.md: zoh-eigenvalues), and the zero
// eigenvalue of the heat-loss bias state is an integrator.
func TestCheckTimeConstantsDemo(t *testing.T) {
	plant, err := config.LoadPlant(plantPath("hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	var eig mat.Eigen
	if !eig.Factorize(plant.Continuous.A, mat.EigenNone) {
		t.Fatal("eigenvalues of the continuous A")
	}
	var want []float64 // time constants, and +Inf for the integrator
	for _, l := range eig.Values(nil) {
		if cmplx.Abs(l) < 1e-12 {
			want = append(want, math.Inf(1))
		} else {
			want = append(want, -1/real(l))
		}
	}
	rep, code := checkJSON(t, plantPath("hotwater-loop.yaml"))
	if code != 0 {
		t.Fatalf("exit status %d: %q", code, rep.Problems)
	}
	var got []float64
	for _, e := range rep.Eigenvalues {
		switch {
		case e.Kind == "integrator":
			got = append(got, math.Inf(1))
		case e.TimeConstantSeconds != nil:
			got = append(got, *e.TimeConstantSeconds)
		default:
			t.Errorf("eigenvalue %+v has no time constant", e)
		}
	}
	if len(got) != len(want) {
		t.Fatalf("%d eigenvalues reported, want %d", len(got), len(want))
	}
	for _, w := range want {
		found := false
		for _, g := range got {
			if g == w || math.Abs(g-w) <= 1e-6*w {
				found = true
			}
		}
		if !found {
			t.Errorf("time constant %.6g s of the continuous A is not reported (got %v)", w, got)
		}
	}
	if !rep.Observability.Prediction.Observable || !rep.Observability.Current.Observable {
		t.Error("the demo plant should be observable in both forms")
	}
	// The committed gains: each fixed set has gains for both single sensors,
	// every gain with S (NIS available) and its poles inside the unit circle.
	g := rep.Gains
	if g == nil || g.Active != "poles-prediction" || g.Candidate != "kalman-current" || len(g.Sets) != 2 {
		t.Fatalf("gains report %+v", g)
	}
	for _, s := range g.Sets {
		if len(s.Patterns) != 3 || len(s.Uncovered) != 0 || s.Error != "" {
			t.Errorf("set %s: %d patterns, uncovered %v, error %q", s.Name, len(s.Patterns), s.Uncovered, s.Error)
		}
		for _, p := range s.Patterns {
			if !p.NIS || !(p.SpectralRadius < 1) || p.ConvergenceSeconds == nil {
				t.Errorf("set %s outputs %v: %+v", s.Name, p.Outputs, p)
			}
		}
	}
	// The placed set achieved the poles it asked for.
	if got := g.Sets[0].Patterns[0].SpectralRadius; math.Abs(got-0.997) > 1e-9 {
		t.Errorf("poles-prediction spectral radius %v, want 0.997 (its requested slowest pole)", got)
	}
}

// TestCheckUndetectable: the level of the invented buffer tank is an
// integrator no output sees; check names the mode and the state.
func TestCheckUndetectable(t *testing.T) {
	rep, code := checkJSON(t, plantPath("unobservable.yaml"))
	if code != 1 || rep.CanRun {
		t.Fatalf("exit status %d, can_run %v; want 1, false", code, rep.CanRun)
	}
	for _, f := range []check.Form{rep.Observability.Prediction, rep.Observability.Current} {
		if f.Observable || f.Detectable || f.Rank != 2 {
			t.Errorf("%s: observable %v, detectable %v, rank %d; want false, false, 2", f.Pair, f.Observable, f.Detectable, f.Rank)
		}
		unseen := 0
		for _, m := range f.Modes {
			if !m.Observable {
				unseen++
				if m.Re != 1 || m.Im != 0 || len(m.Involves) != 1 || m.Involves[0].State != "level" {
					t.Errorf("%s: unseen mode %+v, want λ = 1 involving level alone", f.Pair, m)
				}
			}
		}
		if unseen != 1 {
			t.Errorf("%s: %d unseen modes, want 1", f.Pair, unseen)
		}
	}
	if len(rep.Problems) != 2 || !strings.Contains(rep.Problems[0], "level") || !strings.Contains(rep.Problems[0], "mode 1") {
		t.Errorf("problems %q: want both forms named, with the mode and the state", rep.Problems)
	}
}

// TestCheckFingerprintMismatch: gains designed for one model are refused for
// another, and the report says why.
func TestCheckFingerprintMismatch(t *testing.T) {
	dir := t.TempDir()
	gains := filepath.Join(dir, "di.gains.yaml")
	if _, errOut, code := cli(t, "design", "--poles", "0.5,0.5", "-o", gains, plantPath("cmd:double-integrator.yaml")); code != 0 {
		t.Fatalf("design: %s", errOut)
	}
	// The same plant sampled at 50 ms is another model.
	src, err := os.ReadFile(plantPath("cmd:double-integrator.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	other := filepath.Join(dir, "di-50ms.yaml")
	if err := os.WriteFile(other, []byte(strings.Replace(string(src), "sample: 100ms", "sample: 50ms", 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	out, _, code := cli(t, "check", other, gains)
	if code != 1 {
		t.Errorf("exit status %d, want 1", code)
	}
	for _, want := range []string{gains + ":", "fingerprint", "designed for a different model", "The estimator cannot run"} {
		if !strings.Contains(out, want) {
			t.Errorf("report does not contain %q:\n%s", want, out)
		}
	}
	// Nor will design add to them for the other model.
	if _, errOut, code := cli(t, "design", "--add", "-o", gains, other); code != 1 || !strings.Contains(errOut, "without --add") {
		t.Errorf("design --add onto another model's gains: exit status %d, stderr %q", code, errOut)
	}
	// The original plant accepts them.
	if _, _, code := cli(t, "check", plantPath("cmd:double-integrator.yaml"), gains); code != 0 {
		t.Errorf("check with the gains' own plant: exit status %d, want 0", code)
	}
}

// TestCheckConfigErrors: errors in a plant file are printed as config
// reports them, file:line:column first.
func TestCheckConfigErrors(t *testing.T) {
	path := filepath.Join(t.TempDir(), "bad.yaml")
	src, err := os.ReadFile(plantPath("cmd:random-walk.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	bad := strings.Replace(string(src), "  C: [[1]]\n", "  C: [[1]]\n  E: [[1]]\n", 1)
	if err := os.WriteFile(path, []byte(bad), 0o644); err != nil {
		t.Fatal(err)
	}
	out, errOut, code := cli(t, "check", path)
	if code != 1 || out != "" {
		t.Errorf("exit status %d, stdout %q; want 1 and nothing", code, out)
	}
	if !regexp.MustCompile(`^` + regexp.QuoteMeta(path) + `:\d+:\d+: model`).MatchString(errOut) {
		t.Errorf("stderr %q: want the config error with its position", errOut)
	}
}
