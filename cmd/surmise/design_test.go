package main

import (
	"bytes"
	"math"
	"math/cmplx"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/estimator"
)

// epoch is the design time of the tests' gains files, 2026-12-02T00:00:00Z,
// given as SOURCE_DATE_EPOCH. It is also the time of the committed demo gains.
const epoch = "1796169600"

// designGolden designs to standard output and compares the gains file and
// the summary with their golden files.
func designGolden(t *testing.T, name string, args ...string) string {
	t.Helper()
	t.Setenv("SOURCE_DATE_EPOCH", epoch)
	out, errOut, code := cli(t, append([]string{"design", "-o", "-"}, args...)...)
	if code != 0 {
		t.Fatalf("design %v: exit status %d: %s", args, code, errOut)
	}
	golden(t, name+".yaml", out)
	golden(t, name+".txt", errOut)
	return out
}

// loadDesigned parses a designed gains file against its plant, as run and
// check read it.
func loadDesigned(t *testing.T, plantFile, data string) (*config.Plant, *config.GainsFile) {
	t.Helper()
	plant, err := config.LoadPlant(plantFile)
	if err != nil {
		t.Fatal(err)
	}
	g, err := config.ParseGains("designed.yaml", []byte(data), plant)
	if err != nil {
		t.Fatalf("the designed file is refused: %v", err)
	}
	return plant, g
}

func near(t *testing.T, what string, got, want, tol float64) {
	t.Helper()
	if math.Abs(got-want) > tol*math.Max(1, math.Abs(want)) {
		t.Errorf("%s = %.15g, want %.15g", what, got, want)
	}
}

// TestDesignDoubleIntegratorGolden places both observer poles of the double
// integrator at 0.5; the written gains are the closed forms of SOURCES.md: double-integrator-placement,
// L_p = [1, 2.5], L_c = [0.75, 2.5].
func TestDesignDoubleIntegratorGolden(t *testing.T) {
	for _, tc := range []struct {
		form string
		want [2]float64
	}{
		{"prediction", [2]float64{1, 2.5}}, // [2 − p₁ − p₂, (1 − p₁)(1 − p₂)/T]
		{"current", [2]float64{0.75, 2.5}}, // [1 − p₁p₂, (1 − p₁)(1 − p₂)/T]
	} {
		t.Run(tc.form, func(t *testing.T) {
			pf := plantPath("cmd:double-integrator.yaml")
			data := designGolden(t, "design-double-integrator-"+tc.form, "--form", tc.form, "--poles", "0.5, 0.5", pf)
			plant, g := loadDesigned(t, pf, data)
			name := "poles-" + tc.form
			if g.Active != name || g.Candidate != "" || len(g.Sets) != 1 {
				t.Fatalf("active %q, candidate %q, %d sets; want %q alone", g.Active, g.Candidate, len(g.Sets), name)
			}
			ns := g.Sets[0]
			if len(ns.Set.Gains) != 1 {
				t.Fatalf("%d gains, want 1", len(ns.Set.Gains))
			}
			l := ns.Set.Gains[0].L
			near(t, "L[0]", l.At(0, 0), tc.want[0], 1e-9)
			near(t, "L[1]", l.At(1, 0), tc.want[1], 1e-9)
			pv := ns.Provenance
			if pv.Method != "poles" || len(pv.Poles) != 2 || pv.Poles[0] != 0.5 || pv.Poles[1] != 0.5 {
				t.Errorf("provenance %+v", pv)
			}
			if want := time.Date(2026, 12, 2, 0, 0, 0, 0, time.UTC); !pv.Created.Equal(want) {
				t.Errorf("created %v, want %v from SOURCE_DATE_EPOCH", pv.Created, want)
			}
			if g.Fingerprint != config.Fingerprint(plant.Model) {
				t.Error("fingerprint is not the plant's")
			}
			// S makes NIS available: for a fixed gain it is C·P·Cᵀ + R with P
			// the a priori covariance (common practice); here C = [1, 0].
			pg := ns.Set.Gains[0]
			if pg.S == nil || pg.P == nil {
				t.Fatal("no S or P")
			}
			for _, p := range pg.Poles {
				near(t, "achieved pole", cmplx.Abs(p), 0.5, 1e-6)
			}
		})
	}
}

// TestDesignRandomWalkGolden designs the steady-state Kalman filter of the
// scalar random walk, q = r = 1: K = 0.6180339887, P⁻ = 1.6180339887
// (closed form, SOURCES.md: random-walk-riccati).
func TestDesignRandomWalkGolden(t *testing.T) {
	pf := plantPath("cmd:random-walk.yaml")
	pMinus := (1 + math.Sqrt(5)) / 2 // (q + √(q² + 4qr))/2
	k := pMinus / (pMinus + 1)       // P⁻/(P⁻ + r)
	near(t, "closed-form K", k, 0.6180339887, 1e-10)
	for _, form := range []string{"current", "prediction"} {
		t.Run(form, func(t *testing.T) {
			data := designGolden(t, "design-random-walk-"+form, "--form", form, pf)
			_, g := loadDesigned(t, pf, data)
			ns := g.Set("kalman-" + form)
			if ns == nil || g.Active != ns.Set.Name {
				t.Fatalf("sets %+v, active %q", g.Sets, g.Active)
			}
			pg := ns.Set.Gains[0]
			// L_c = K; L_p = A·L_c = K for A = 1 (common practice).
			near(t, "L", pg.L.At(0, 0), k, 1e-9)
			near(t, "S", pg.S.At(0, 0), pMinus+1, 1e-9)
			wantP := pMinus // prediction form publishes the a priori covariance
			if form == "current" {
				wantP = pMinus * 1 / (pMinus + 1) // a posteriori P⁻r/(P⁻ + r)
			}
			near(t, "P", pg.P.At(0, 0), wantP, 1e-9)
			near(t, "pole", real(pg.Poles[0]), 1-k, 1e-9)
			pv := ns.Provenance
			if pv.Method != "kalman" || pv.Q == nil || pv.Q.At(0, 0) != 1 || pv.R == nil || pv.R.At(0, 0) != 1 {
				t.Errorf("provenance %+v: want method kalman with Q = R = 1", pv)
			}
		})
	}
}

// TestDesignKalmanMatchesScipy designs the Kalman gains of the discrete
// hot-water loop and compares them with the fixture computed by
// scipy.linalg.solve_discrete_are (testdata/plants/hotwater-loop-discrete.gains.yaml,
// written by testdata/config/kalman_gains.py; rerun it with
// /usr/bin/python3 testdata/config/kalman_gains.py).
func TestDesignKalmanMatchesScipy(t *testing.T) {
	pf := plantPath("hotwater-loop-discrete.yaml")
	plant, err := config.LoadPlant(pf)
	if err != nil {
		t.Fatal(err)
	}
	ref, err := config.LoadGains(plantPath("hotwater-loop-discrete.gains.yaml"), plant)
	if err != nil {
		t.Fatal(err)
	}
	t.Setenv("SOURCE_DATE_EPOCH", epoch)
	for _, tc := range []struct{ form, refSet string }{{"current", "kalman-current"}, {"prediction", "kalman-prediction"}} {
		out, errOut, code := cli(t, "design", "--form", tc.form, "--patterns", "-o", "-", pf)
		if code != 0 {
			t.Fatalf("design: %s", errOut)
		}
		_, g := loadDesigned(t, pf, out)
		want := ref.Set(tc.refSet)
		if want == nil {
			t.Fatalf("fixture has no set %q", tc.refSet)
		}
		got := g.Sets[0].Set
		// Gains for both sensors, and for each alone.
		if len(got.Gains) != 3 {
			t.Errorf("%s: %d gains, want 3", tc.form, len(got.Gains))
		}
		compared := 0
		for _, wg := range want.Set.Gains {
			for _, gg := range got.Gains {
				if gg.Outputs != wg.Outputs {
					continue
				}
				compared++
				for _, m := range []struct {
					name      string
					got, want mat.Matrix
				}{{"L", gg.L, wg.L}, {"S", gg.S, wg.S}, {"P", gg.P, wg.P}} {
					if !mat.EqualApprox(m.got, m.want, 1e-7*mat.Norm(m.want, math.Inf(1))) {
						t.Errorf("%s form, outputs %b: %s = %v, scipy %v", tc.form, uint64(gg.Outputs), m.name,
							mat.Formatted(m.got), mat.Formatted(m.want))
					}
				}
			}
		}
		if compared != len(want.Set.Gains) {
			t.Errorf("%s: compared %d of the fixture's %d gains", tc.form, compared, len(want.Set.Gains))
		}
	}
}

// designDemo writes the demo plant's gains as the committed file was made
// (see README.md, "The first hour") into dir and returns the bytes and the
// summaries.
func designDemo(t *testing.T, dir string) ([]byte, string) {
	t.Helper()
	t.Setenv("SOURCE_DATE_EPOCH", epoch)
	out := filepath.Join(dir, "hotwater-loop.gains.yaml")
	pf := plantPath("hotwater-loop.yaml")
	var summary strings.Builder
	for _, args := range [][]string{
		{"design", "--form", "prediction", "--poles", "0.997,0.97,0.86,0.85", "--patterns", "-o", out, pf},
		{"design", "--add", "--candidate", "--patterns", "-o", out, pf},
	} {
		so, se, code := cli(t, args...)
		if code != 0 {
			t.Fatalf("%v: exit status %d: %s", args, code, se)
		}
		summary.WriteString(strings.ReplaceAll(so, dir, "$DIR"))
	}
	data, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	return data, summary.String()
}

// TestDesignDemoGolden: the commands of the README reproduce the committed
// demo gains byte for byte, twice (designing is deterministic), and leave
// no temporary file behind.
func TestDesignDemoGolden(t *testing.T) {
	dir1, dir2 := t.TempDir(), t.TempDir()
	first, summary := designDemo(t, dir1)
	second, _ := designDemo(t, dir2)
	golden(t, "design-hotwater-loop.txt", summary)
	if !bytes.Equal(first, second) {
		t.Error("designing twice from the same inputs gave different files")
	}
	committed, err := os.ReadFile(plantPath("hotwater-loop.gains.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(first, committed) {
		t.Error("testdata/plants/hotwater-loop.gains.yaml is not what the README's design commands write: regenerate it with them")
	}
	entries, err := os.ReadDir(dir1)
	if err != nil {
		t.Fatal(err)
	}
	if len(entries) != 1 {
		t.Errorf("the output directory holds %d entries, want the gains file alone", len(entries))
	}
}

// TestDesignTime: --time wins over SOURCE_DATE_EPOCH, which wins over the
// clock; only the recorded time differs between the files.
func TestDesignTime(t *testing.T) {
	pf := plantPath("cmd:random-walk.yaml")
	t.Setenv("SOURCE_DATE_EPOCH", epoch)
	a, _, _ := cli(t, "design", "-o", "-", pf)
	b, _, _ := cli(t, "design", "-o", "-", "--time", "2025-06-01T14:03:00Z", pf)
	if !strings.Contains(a, `created: "2026-12-02T00:00:00Z"`) || !strings.Contains(b, `created: "2025-06-01T14:03:00Z"`) {
		t.Errorf("created times:\n%s\n%s", a, b)
	}
	if strings.Replace(a, "2026-12-02T00:00:00Z", "2025-06-01T14:03:00Z", 1) != b {
		t.Error("the files differ in more than their time")
	}
	t.Setenv("SOURCE_DATE_EPOCH", "yesterday")
	if _, errOut, code := cli(t, "design", "-o", "-", pf); code != 1 || !strings.Contains(errOut, "SOURCE_DATE_EPOCH") {
		t.Errorf("a malformed SOURCE_DATE_EPOCH: exit status %d, stderr %q", code, errOut)
	}
	if _, _, code := cli(t, "design", "-o", "-", "--time", "noon", pf); code != 2 {
		t.Errorf("a malformed --time: exit status %d, want 2", code)
	}
}

// TestDesignAdd builds a file with an active and a candidate set and
// replaces them one at a time.
func TestDesignAdd(t *testing.T) {
	t.Setenv("SOURCE_DATE_EPOCH", epoch)
	pf := plantPath("cmd:double-integrator.yaml")
	out := filepath.Join(t.TempDir(), "g.yaml")
	step := func(wantCode int, args ...string) string {
		t.Helper()
		_, errOut, code := cli(t, append(append([]string{"design", "-o", out}, args...), pf)...)
		if code != wantCode {
			t.Fatalf("design %v: exit status %d, want %d: %s", args, code, wantCode, errOut)
		}
		return errOut
	}
	roles := func() (string, string, []string) {
		t.Helper()
		data, err := os.ReadFile(out)
		if err != nil {
			t.Fatal(err)
		}
		_, g := loadDesigned(t, pf, string(data))
		var names []string
		for _, s := range g.Sets {
			names = append(names, s.Set.Name)
		}
		return g.Active, g.Candidate, names
	}
	step(0, "--poles", "0.5,0.5", "--form", "prediction")
	step(0, "--add", "--candidate")
	if a, c, s := roles(); a != "poles-prediction" || c != "kalman-current" || strings.Join(s, ",") != "poles-prediction,kalman-current" {
		t.Fatalf("after adding the candidate: active %q, candidate %q, sets %v", a, c, s)
	}
	// Replacing the candidate keeps the active set.
	step(0, "--add", "--candidate", "--faster", "2", "--name", "kalman-current")
	a, c, s := roles()
	if a != "poles-prediction" || c != "kalman-current" || len(s) != 2 {
		t.Fatalf("after replacing the candidate: active %q, candidate %q, sets %v", a, c, s)
	}
	// A new active set keeps the candidate.
	step(0, "--add", "--poles", "0.6,0.6", "--form", "prediction", "--name", "poles-0.6")
	if a, c, s := roles(); a != "poles-0.6" || c != "kalman-current" || len(s) != 3 {
		t.Fatalf("after a new active set: active %q, candidate %q, sets %v", a, c, s)
	}
	// Promoting the candidate by designing it again as active clears the candidate.
	step(0, "--add", "--name", "kalman-current")
	if a, c, _ := roles(); a != "kalman-current" || c != "" {
		t.Fatalf("after promoting: active %q, candidate %q", a, c)
	}
	before, _ := os.ReadFile(out)
	// The active set cannot become the candidate of itself.
	if msg := step(1, "--add", "--candidate", "--name", "kalman-current"); !strings.Contains(msg, "active set") {
		t.Errorf("refusal %q", msg)
	}
	// A refused design leaves the file as it was.
	if after, _ := os.ReadFile(out); !bytes.Equal(before, after) {
		t.Error("a refused design changed the file")
	}
	step(2, "--candidate")
}

// TestDesignRefusals: each refusal gives its reason and writes nothing.
func TestDesignRefusals(t *testing.T) {
	di := plantPath("cmd:double-integrator.yaml")
	for _, tc := range []struct {
		name     string
		args     []string
		wantCode int
		want     string
	}{
		{"undetectable", []string{plantPath("unobservable.yaml")}, 1, "not detectable"},
		{"unobservable placement", []string{"--form", "prediction", "--poles", "0.5,0.5,0.5", plantPath("unobservable.yaml")}, 1, "not observable"},
		{"pole outside the unit circle", []string{"--poles", "1.5,0.5", di}, 1, "unit circle"},
		{"pole on the unit circle", []string{"--poles", "0.6+0.8i,0.6-0.8i", di}, 1, "unit circle"},
		{"too few poles", []string{"--poles", "0.5", di}, 1, "2 states"},
		{"pole without its conjugate", []string{"--poles", "0.5+0.1i,0.5", di}, 1, "conjugate"},
		{"placement without poles", []string{"--method", "place", di}, 2, "--poles"},
		{"poles and faster", []string{"--poles", "0.5,0.5", "--faster", "2", di}, 2, "not both"},
		{"kalman with poles", []string{"--method", "kalman", "--poles", "0.5,0.5", di}, 2, "--method poles"},
		{"unknown method", []string{"--method", "guess", di}, 2, "poles or kalman"},
		{"kalman form", []string{"--form", "kalman", di}, 2, "prediction or current"},
		{"bad pole", []string{"--poles", "0.5,half", di}, 2, `"half"`},
		{"no plant", nil, 2, "one plant file"},
		{"bad set name", []string{"--name", "my set", di}, 1, "not a valid set name"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			out := filepath.Join(t.TempDir(), "g.yaml")
			_, errOut, code := cli(t, append([]string{"design", "-o", out}, tc.args...)...)
			if code != tc.wantCode || !strings.Contains(errOut, tc.want) {
				t.Errorf("exit status %d, stderr %q; want %d and %q", code, errOut, tc.wantCode, tc.want)
			}
			if _, err := os.Stat(out); err == nil {
				t.Error("a refused design wrote the file")
			}
		})
	}
}

// TestDesignPatterns: with --patterns the demo plant gets a gain for each
// sensor alone, and each gain places the requested poles (or, for Kalman,
// the error dynamics are stable).
func TestDesignPatterns(t *testing.T) {
	pf := plantPath("hotwater-loop.yaml")
	t.Setenv("SOURCE_DATE_EPOCH", epoch)
	for _, args := range [][]string{
		{"--faster", "2", "--form", "current"},
		{"--form", "prediction"},
	} {
		out, errOut, code := cli(t, append(append([]string{"design", "--patterns", "-o", "-"}, args...), pf)...)
		if code != 0 {
			t.Fatalf("%v: %s", args, errOut)
		}
		plant, g := loadDesigned(t, pf, out)
		set := g.Sets[0]
		var pats []estimator.Pattern
		for _, pg := range set.Set.Gains {
			pats = append(pats, pg.Outputs)
			cs := estimator.OutputRows(plant.Model.C, pg.Outputs)
			poles := estimator.Eigenvalues(estimator.ErrorDynamics(plant.Model.A, cs, pg.L, set.Set.Form))
			for _, p := range poles {
				if !(cmplx.Abs(p) < 1) {
					t.Errorf("%v outputs %b: pole %v", args, uint64(pg.Outputs), p)
				}
			}
			if set.Provenance.Poles != nil {
				for i, p := range set.Provenance.Poles {
					if cmplx.Abs(poles[i]-p) > 1e-6 {
						t.Errorf("%v outputs %b: achieved %v, requested %v", args, uint64(pg.Outputs), poles, set.Provenance.Poles)
						break
					}
				}
			}
		}
		if len(pats) != 3 || pats[0] != 3 || pats[1] != 1 || pats[2] != 2 {
			t.Errorf("%v: patterns %v, want all outputs, then each alone", args, pats)
		}
		if set.Provenance.Poles != nil && set.Provenance.Factor != 2 {
			t.Errorf("--faster 2 recorded as factor %v", set.Provenance.Factor)
		}
	}
}

func TestParsePoles(t *testing.T) {
	for _, tc := range []struct {
		in   string
		want []complex128
		ok   bool
	}{
		{"0.8,0.8,0.7+0.1i,0.7-0.1i", []complex128{0.8, 0.8, 0.7 + 0.1i, 0.7 - 0.1i}, true},
		{" 0.5 , 0.5 ", []complex128{0.5, 0.5}, true},
		{"0.7±0.1i,0.2", []complex128{0.7 + 0.1i, 0.7 - 0.1i, 0.2}, true},
		{"0.7+-0.1i", []complex128{0.7 + 0.1i, 0.7 - 0.1i}, true},
		{"-0.5,0", []complex128{-0.5, 0}, true},
		{"", nil, false},
		{"0.5,,0.5", nil, false},
		{"0.5;0.5", nil, false},
		{"NaN", nil, false},
		{"Inf", nil, false},
		{"0.5±0", nil, false},
	} {
		got, err := parsePoles(tc.in)
		if (err == nil) != tc.ok {
			t.Errorf("parsePoles(%q) error %v, want ok %v", tc.in, err, tc.ok)
			continue
		}
		if tc.ok && !equalPoles(got, tc.want) {
			t.Errorf("parsePoles(%q) = %v, want %v", tc.in, got, tc.want)
		}
	}
}

func equalPoles(a, b []complex128) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// FuzzParsePoles: parsePoles never panics, and what it accepts is finite and
// formats back to poles that parse to the same values.
func FuzzParsePoles(f *testing.F) {
	for _, s := range []string{"0.8,0.8,0.7+0.1i,0.7-0.1i", "0.7±0.1i", "1e-3", "-0", "0.5+-0.2i", "±", ",", "1i"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		ps, err := parsePoles(s)
		if err != nil {
			return
		}
		var parts []string
		for _, p := range ps {
			if cmplx.IsNaN(p) || cmplx.IsInf(p) {
				t.Fatalf("parsePoles(%q) accepted %v", s, p)
			}
			parts = append(parts, formatExact(p))
		}
		back, err := parsePoles(strings.Join(parts, ","))
		if err != nil || !equalPoles(back, ps) {
			t.Fatalf("parsePoles(%q) = %v; formatted %q reads back as %v, %v", s, ps, parts, back, err)
		}
	})
}

// formatExact writes a pole with all its digits, for the round trip.
func formatExact(c complex128) string { return strconv.FormatComplex(c, 'g', -1, 128) }
