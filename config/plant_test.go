package config

import (
	"encoding/json"
	"errors"
	"io/fs"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

const (
	hotwaterFile    = "../testdata/plants/hotwater-loop.yaml"
	hotwaterDiscret = "../testdata/plants/hotwater-loop-discrete.yaml"
	cartFile        = "../testdata/config/double-integrator.yaml"
)

func mustLoad(t testing.TB, path string) *Plant {
	t.Helper()
	p, err := LoadPlant(path)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// closeTo reports whether got and want agree entry by entry within tol times
// the largest entry of want.
func closeTo(got, want mat.Matrix, tol float64) bool {
	gr, gc := got.Dims()
	wr, wc := want.Dims()
	if gr != wr || gc != wc {
		return false
	}
	scale := mat.Norm(want, math.Inf(1))
	for i := 0; i < wr; i++ {
		for j := 0; j < wc; j++ {
			if math.Abs(got.At(i, j)-want.At(i, j)) > tol*scale {
				return false
			}
		}
	}
	return true
}

// TestHotWaterLoop parses the continuous demo plant (discretised by
// estimator.Discretise) and its discrete variant, whose A, B and Q were
// computed from the same file (SOURCES.md: hotwater-loop) by scipy.linalg.expm (zero-order hold and Van
// Loan, cross-checked by quadrature) in testdata/plants/hotwater_loop.py.
func TestHotWaterLoop(t *testing.T) {
	cont := mustLoad(t, hotwaterFile)
	disc := mustLoad(t, hotwaterDiscret)
	if cont.Continuous == nil || cont.Continuous.Qc == nil {
		t.Fatal("continuous plant without its continuous model and intensity")
	}
	if disc.Continuous != nil {
		t.Error("discrete plant has a continuous model")
	}
	for _, c := range []struct {
		name      string
		got, want mat.Matrix
		tol       float64
	}{
		{"A", cont.Model.A, disc.Model.A, 1e-13}, // scipy fixture, hotwater_loop.py
		{"B", cont.Model.B, disc.Model.B, 1e-13}, // scipy fixture
		{"Q", cont.Model.Q, disc.Model.Q, 1e-12}, // scipy fixture (Van Loan and quadrature agree to 2e-16)
		{"C", cont.Model.C, disc.Model.C, 0},
		{"D", cont.Model.D, mat.NewDense(2, 1, nil), 0}, // D omitted: zeros
		{"R", cont.Model.R, disc.Model.R, 0},
		// the file's std: [0.02, 0.002, 0.01, 0.0005] squared
		{"Qc", cont.Continuous.Qc, diagonal([]float64{0.02, 0.002, 0.01, 0.0005}), 0},
	} {
		if !closeTo(c.got, c.want, c.tol) {
			t.Errorf("%s =\n%v\nwant\n%v", c.name, mat.Formatted(c.got), mat.Formatted(c.want))
		}
	}
	if cont.Model.Ts != 1 {
		t.Errorf("Ts = %v, want 1 (sample: 1s)", cont.Model.Ts)
	}
	// The operating point and names as written in hotwater-loop.yaml.
	wantX0 := []float64{91.2, 61.0, 52.3, 0}
	for i, x := range wantX0 {
		if cont.Model.X0[i] != x || cont.Initial[i] != x {
			t.Errorf("X0[%d] = %v, Initial[%d] = %v, want %v", i, cont.Model.X0[i], i, cont.Initial[i], x)
		}
	}
	if got := cont.Model.States[3]; got != (estimator.Signal{Name: "heat_loss", Unit: "kW"}) {
		t.Errorf("state 3 = %+v", got)
	}
	want := Wire{Signal: "tank_outlet", Unit: "degC", Subject: "pilot.hwl.tt110.pv", MaxAge: 3 * time.Second, Min: 0, Max: 99, HasRange: true}
	if cont.Outputs[0] != want {
		t.Errorf("output 0 wired %+v, want %+v", cont.Outputs[0], want)
	}
	if got, want := cont.GainsPath, filepath.Join("../testdata/plants", "hotwater-loop.gains.yaml"); got != want {
		t.Errorf("GainsPath = %q, want %q", got, want)
	}
	if cont.InitialCov == nil || cont.InitialCov.At(3, 3) != 0.3*0.3 {
		t.Errorf("initial covariance %v, want diag of std [5, 1, 3, 0.3] squared", cont.InitialCov)
	}
}

// TestPlantSettings checks defaults and explicit values of the optional keys
// on small edits of double-integrator.yaml.
func TestPlantSettings(t *testing.T) {
	base, err := os.ReadFile(cartFile)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name  string
		extra string
		check func(t *testing.T, p *Plant)
	}{
		{"defaults", "", func(t *testing.T, p *Plant) {
			if p.Gate != DefaultGate || p.Window != DefaultWindow || p.Publish != "surmise.double-integrator" {
				t.Errorf("gate %v, window %d, publish %q: want the defaults", p.Gate, p.Window, p.Publish)
			}
			if p.Inputs[0].MaxAge != 300*time.Millisecond {
				t.Errorf("input max_age %v, want 3 × 100ms", p.Inputs[0].MaxAge)
			}
			if p.Outputs[1].MaxAge != time.Second || p.Outputs[1].HasRange {
				t.Errorf("output 1 %+v, want max_age 1s and no range", p.Outputs[1])
			}
			if p.InitialCov != nil || len(p.Initial) != 2 || p.Initial[0] != 0 || p.Initial[1] != 0 {
				t.Errorf("initial %v %v, want the (zero) operating point and no covariance", p.Initial, p.InitialCov)
			}
			if p.Model.Ts != 0.1 {
				t.Errorf("Ts = %v, want 0.1", p.Model.Ts)
			}
			// R as written, Q the square of std [0.001, 0.01]
			if !closeTo(p.Model.R, mat.NewDiagDense(2, []float64{1e-4, 2.5e-3}), 0) {
				t.Errorf("R = %v", mat.Formatted(p.Model.R))
			}
			if !closeTo(p.Model.Q, mat.NewDiagDense(2, []float64{1e-6, 1e-4}), 1e-15) {
				t.Errorf("Q = %v", mat.Formatted(p.Model.Q))
			}
		}},
		{"explicit", "gate: 0\nwindow: 5\npublish: lab.est.cart\ninitial:\n  state: [0.5, -1]\n  covariance: [[1, 0.5], [0.5, 1]]\n", func(t *testing.T, p *Plant) {
			if p.Gate != 0 || p.Window != 5 || p.Publish != "lab.est.cart" {
				t.Errorf("gate %v, window %d, publish %q: want 0, 5, lab.est.cart", p.Gate, p.Window, p.Publish)
			}
			if p.Initial[0] != 0.5 || p.Initial[1] != -1 || p.InitialCov.At(0, 1) != 0.5 {
				t.Errorf("initial %v %v", p.Initial, mat.Formatted(p.InitialCov))
			}
		}},
		{"null optional", "initial:\ngate: ~\n", func(t *testing.T, p *Plant) {
			if p.Gate != DefaultGate || p.Initial == nil {
				t.Errorf("gate %v initial %v: a null optional key counts as absent", p.Gate, p.Initial)
			}
		}},
	} {
		t.Run(c.name, func(t *testing.T) {
			data := strings.Replace(string(base), "gains: double-integrator.gains.yaml\n", "", 1) + c.extra
			p, err := ParsePlant("dir/cart.yaml", []byte(data))
			if err != nil {
				t.Fatal(err)
			}
			if p.GainsPath != filepath.Join("dir", "double-integrator.gains.yaml") {
				t.Errorf("GainsPath %q, want dir/<name>.gains.yaml", p.GainsPath)
			}
			c.check(t, p)
		})
	}
}

func TestLoadPlantMissing(t *testing.T) {
	_, err := LoadPlant(filepath.Join(t.TempDir(), "nope.yaml"))
	if !errors.Is(err, fs.ErrNotExist) {
		t.Fatalf("error %v, want one wrapping fs.ErrNotExist", err)
	}
}

// TestFingerprintReference compares Fingerprint with the values computed by
// testdata/config/fingerprint.py from the documented encoding alone.
func TestFingerprintReference(t *testing.T) {
	data, err := os.ReadFile("../testdata/config/fingerprints.json")
	if err != nil {
		t.Fatal(err)
	}
	var want map[string]string
	if err := json.Unmarshal(data, &want); err != nil {
		t.Fatal(err)
	}
	if len(want) == 0 {
		t.Fatal("no fingerprints in fingerprints.json")
	}
	for file, fp := range want {
		if got := Fingerprint(mustLoad(t, "../"+file).Model); got != fp {
			t.Errorf("%s: Fingerprint = %s, fingerprint.py says %s", file, got, fp)
		}
	}
}

// TestFingerprintCovers changes one thing at a time and checks whether the
// fingerprint follows: it must for A, B, C, D, Ts and every name, and must not
// for units, the operating point and the noise.
func TestFingerprintCovers(t *testing.T) {
	base := mustLoad(t, cartFile).Model
	fp := Fingerprint(base)
	clone := func() *estimator.Model {
		m := *base
		m.A, m.B, m.C, m.D = mat.DenseCopyOf(base.A), mat.DenseCopyOf(base.B), mat.DenseCopyOf(base.C), mat.DenseCopyOf(base.D)
		m.States = append([]estimator.Signal(nil), base.States...)
		m.Inputs = append([]estimator.Signal(nil), base.Inputs...)
		m.Outputs = append([]estimator.Signal(nil), base.Outputs...)
		return &m
	}
	for _, c := range []struct {
		name    string
		edit    func(m *estimator.Model)
		changes bool
	}{
		{"A", func(m *estimator.Model) { m.A.Set(0, 1, 0.2) }, true},
		{"A last bit", func(m *estimator.Model) { m.A.Set(0, 1, math.Nextafter(0.1, 1)) }, true},
		{"B", func(m *estimator.Model) { m.B.Set(1, 0, 0.2) }, true},
		{"C", func(m *estimator.Model) { m.C.Set(1, 0, 1) }, true},
		{"D", func(m *estimator.Model) { m.D.Set(0, 0, 1) }, true},
		{"Ts", func(m *estimator.Model) { m.Ts = 0.2 }, true},
		{"state name", func(m *estimator.Model) { m.States[0].Name = "x" }, true},
		{"input name", func(m *estimator.Model) { m.Inputs[0].Name = "force" }, true},
		{"output name", func(m *estimator.Model) { m.Outputs[1].Name = "speed" }, true},
		{"names swapped", func(m *estimator.Model) { m.Outputs[0].Name, m.Outputs[1].Name = m.Outputs[1].Name, m.Outputs[0].Name }, true},
		{"name bytes move between names", func(m *estimator.Model) { m.States[0].Name, m.States[1].Name = "positionv", "elocity" }, true},
		{"unit", func(m *estimator.Model) { m.States[0].Unit = "mm" }, false},
		{"operating point", func(m *estimator.Model) { m.X0 = []float64{1, 2}; m.U0 = []float64{3}; m.Y0 = []float64{1, 2} }, false},
		{"noise", func(m *estimator.Model) { m.Q = diagonal([]float64{1, 1}); m.R = nil }, false},
		{"negative zero", func(m *estimator.Model) { m.A.Set(1, 0, math.Copysign(0, -1)) }, false},
	} {
		m := clone()
		c.edit(m)
		if got := Fingerprint(m); (got != fp) != c.changes {
			t.Errorf("%s: fingerprint %s, base %s; want changed = %v", c.name, got, fp, c.changes)
		}
	}
	if !strings.HasPrefix(fp, "sha256:") || len(fp) != len("sha256:")+64 {
		t.Errorf("fingerprint %q, want sha256: and 64 hex digits", fp)
	}
}

// TestParseWrongKindOfFile: a CSV, a gains file given as a plant file and
// the reverse each get one short error that says what the file is, not a
// key error per line or the whole file repeated.
func TestParseWrongKindOfFile(t *testing.T) {
	csv := "time,heater_power,tank_outlet\n" + strings.Repeat("2026-01-05T08:00:00Z,7.8,61.05279925908432\n", 500)
	gains, err := os.ReadFile(cartGains)
	if err != nil {
		t.Fatal(err)
	}
	plantData, err := os.ReadFile(cartFile)
	if err != nil {
		t.Fatal(err)
	}
	long := "just some text " + strings.Repeat("x", 300)
	for _, tc := range []struct {
		name, want string
		parse      func() error
	}{
		{"CSV as plant", "not a plant file: this looks like a CSV file", func() error { _, err := ParsePlant("run.csv", []byte(csv)); return err }},
		{"gains as plant", "this is a gains file, not a plant file", func() error { _, err := ParsePlant("g.yaml", gains); return err }},
		{"long text as plant", `(a text of 315 bytes)`, func() error { _, err := ParsePlant("t.yaml", []byte(long)); return err }},
		{"plant as gains", "this is a plant file, not a gains file", func() error {
			_, err := ParseGains("p.yaml", plantData, mustLoad(t, cartFile))
			return err
		}},
	} {
		err := tc.parse()
		if err == nil {
			t.Errorf("%s: no error", tc.name)
			continue
		}
		msg := err.Error()
		if !strings.Contains(msg, tc.want) || strings.Count(msg, "\n") > 0 || len(msg) > 200 {
			t.Errorf("%s: %q, want one short line with %q", tc.name, msg, tc.want)
		}
	}
}
