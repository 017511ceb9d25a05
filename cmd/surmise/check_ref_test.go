package main

import (
	"encoding/json"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/daemon/check"
)

// checkRef is testdata/reference/checkreport.json, written by
// testdata/reference/checkreport.py from the plant and gains files with
// numpy and scipy (SOURCES.md: check-report).
type checkRef struct {
	Source string `json:"source"`
	Cases  []struct {
		Name          string               `json:"name"`
		Plant         string               `json:"plant"`
		SampleSeconds float64              `json:"sample_seconds"`
		A             [][]float64          `json:"A"`
		Eigenvalues   []refEigen           `json:"eigenvalues"`
		PBH           map[string][]refMode `json:"pbh"`
		Gains         []struct {
			File string `json:"file"`
			Sets []struct {
				Name     string       `json:"name"`
				Form     string       `json:"form"`
				Patterns []refPattern `json:"patterns"`
			} `json:"sets"`
		} `json:"gains"`
	} `json:"cases"`
}

type refEigen struct {
	Re, Im, Abs  float64
	TimeConstant *float64 `json:"time_constant_seconds"`
	Period       *float64 `json:"period_seconds"`
}

type refMode struct {
	Re, Im, Abs float64
	SigmaMin    float64 `json:"sigma_min"`
}

type refPattern struct {
	Outputs        []string    `json:"outputs"`
	SpectralRadius float64     `json:"spectral_radius"`
	Convergence    *float64    `json:"convergence_seconds"`
	L, S, P        [][]float64 // nil where the script did not compute them
}

func loadCheckRef(t *testing.T) *checkRef {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("..", "..", "testdata", "reference", "checkreport.json"))
	if err != nil {
		t.Fatal(err)
	}
	var ref checkRef
	if err := json.Unmarshal(data, &ref); err != nil {
		t.Fatalf("checkreport.json: %v", err)
	}
	if len(ref.Cases) == 0 {
		t.Fatal("checkreport.json has no cases")
	}
	return &ref
}

// relNear reports whether got is within tol of want, relative to
// max(1, |want|)·scale.
func relNear(got, want, tol, scale float64) bool {
	return math.Abs(got-want) <= tol*math.Max(1, math.Abs(want))*scale
}

// TestCheckAgainstScipy compares the numbers `surmise check --json` reports
// for the reference plants and the demo plant with values computed
// independently by numpy and scipy (SOURCES.md: check-report): the
// eigenvalues of the discrete A and their time constants, the scaled PBH σ
// of every mode in both forms (SOURCES.md: pbh-test), and the spectral
// radius and slowest error time constant of every gain. The golden files of
// TestCheckGolden are regression snapshots of the layout; these are the
// checks of the numbers.
func TestCheckAgainstScipy(t *testing.T) {
	ref := loadCheckRef(t)
	for _, rc := range ref.Cases {
		files := []string{""}
		if len(rc.Gains) > 0 {
			files = nil
			for _, g := range rc.Gains {
				files = append(files, g.File)
			}
		}
		for gi, gf := range files {
			t.Run(rc.Name+"/"+filepath.Base(gf), func(t *testing.T) {
				args := []string{filepath.Join("..", "..", rc.Plant)}
				if gf != "" {
					args = append(args, filepath.Join("..", "..", gf))
				}
				rep, _ := checkJSON(t, args...)

				// The discrete A: to 1e-9 of its largest entry (ten significant
				// digits in the report; quadrature and expm agree far better).
				for i, row := range rc.A {
					for j, want := range row {
						if got := rep.Model.A[i][j]; !relNear(got, want, 1e-9, 1) {
							t.Errorf("A[%d][%d] = %.12g, scipy %.12g", i, j, got, want)
						}
					}
				}

				// Eigenvalues and time constants, in the report's order.
				if len(rep.Eigenvalues) != len(rc.Eigenvalues) {
					t.Fatalf("%d eigenvalues, scipy %d", len(rep.Eigenvalues), len(rc.Eigenvalues))
				}
				for i, want := range rc.Eigenvalues {
					got := rep.Eigenvalues[i]
					if !relNear(got.Abs, want.Abs, 1e-9, 1) || !relNear(got.Re, want.Re, 1e-9, 1) {
						t.Errorf("eigenvalue %d: %+v, scipy %+v", i, got, want)
					}
					// A time constant −Ts/ln|λ| amplifies an error in |λ| by
					// 1/(|λ|·ln²|λ|); with |λ| to 1e-15 that is 1e-9 relative
					// for the slowest mode here (|λ| = 0.99926).
					checkSeconds(t, fmt.Sprintf("eigenvalue %d time constant", i), got.TimeConstantSeconds, want.TimeConstant, 1e-7)
					checkSeconds(t, fmt.Sprintf("eigenvalue %d period", i), got.PeriodSeconds, want.Period, 1e-7)
				}

				// PBH σ per distinct mode, both forms.
				for _, f := range []struct {
					name string
					got  check.Form
				}{{"prediction", rep.Observability.Prediction}, {"current", rep.Observability.Current}} {
					want := rc.PBH[f.name]
					if len(f.got.Modes) != len(want) {
						t.Errorf("%s form: %d modes, scipy %d", f.name, len(f.got.Modes), len(want))
						continue
					}
					for i, w := range want {
						g := f.got.Modes[i]
						// σ is a smallest singular value: absolute accuracy about
						// machine precision times the largest, here ≤ 1.
						if !relNear(g.Abs, w.Abs, 1e-9, 1) || math.Abs(g.SigmaMin-w.SigmaMin) > 1e-9 {
							t.Errorf("%s form mode %d: |λ| %.12g σ %.12g, scipy |λ| %.12g σ %.12g", f.name, i, g.Abs, g.SigmaMin, w.Abs, w.SigmaMin)
						}
					}
				}

				if gf == "" {
					return
				}
				if rep.Gains == nil {
					t.Fatal("no gains section")
				}
				refSets := rc.Gains[gi].Sets
				if len(rep.Gains.Sets) != len(refSets) {
					t.Fatalf("%d gain sets, scipy %d", len(rep.Gains.Sets), len(refSets))
				}
				for si, rs := range refSets {
					gs := rep.Gains.Sets[si]
					if len(gs.Patterns) != len(rs.Patterns) {
						t.Errorf("set %s: %d patterns, scipy %d", gs.Name, len(gs.Patterns), len(rs.Patterns))
						continue
					}
					for pi, rp := range rs.Patterns {
						gp := gs.Patterns[pi]
						what := fmt.Sprintf("set %s outputs %s", gs.Name, strings.Join(gp.Outputs, "+"))
						if strings.Join(gp.Outputs, "+") != strings.Join(rp.Outputs, "+") {
							t.Errorf("%s: scipy has outputs %v", what, rp.Outputs)
						}
						if !relNear(gp.SpectralRadius, rp.SpectralRadius, 1e-9, 1) {
							t.Errorf("%s: spectral radius %.12g, scipy %.12g", what, gp.SpectralRadius, rp.SpectralRadius)
						}
						checkSeconds(t, what+": convergence", gp.ConvergenceSeconds, rp.Convergence, 1e-6)
					}
				}
			})
		}
	}
}

// checkSeconds compares a reported time (nil when there is none) with
// scipy's.
func checkSeconds(t *testing.T, what string, got, want *float64, tol float64) {
	t.Helper()
	switch {
	case got == nil && want == nil:
	case got == nil || want == nil:
		t.Errorf("%s: reported %v, scipy %v", what, fmtPtr(got), fmtPtr(want))
	case !relNear(*got, *want, tol, 1):
		t.Errorf("%s = %.12g, scipy %.12g", what, *got, *want)
	}
}

func fmtPtr(p *float64) string {
	if p == nil {
		return "none"
	}
	return fmt.Sprint(*p)
}

// TestGainCovariancesAgainstScipy compares the S and P that `surmise design`
// wrote into the committed gains files (the demo plant's, and the golden
// designs of the reference plants, which TestDesign*Golden prove are what
// design writes) with scipy's: for a placed gain, from the error equations
// with its L (SOURCES.md: fixed-gain-covariance); for a Kalman design, the
// steady-state filter, L included (SOURCES.md: lyapunov-kalman).
func TestGainCovariancesAgainstScipy(t *testing.T) {
	ref := loadCheckRef(t)
	for _, rc := range ref.Cases {
		for _, rg := range rc.Gains {
			t.Run(rc.Name+"/"+filepath.Base(rg.File), func(t *testing.T) {
				plant, err := config.LoadPlant(filepath.Join("..", "..", rc.Plant))
				if err != nil {
					t.Fatal(err)
				}
				g, err := config.LoadGains(filepath.Join("..", "..", rg.File), plant)
				if err != nil {
					t.Fatal(err)
				}
				if len(g.Sets) != len(rg.Sets) {
					t.Fatalf("%d sets, scipy %d", len(g.Sets), len(rg.Sets))
				}
				for si, rs := range rg.Sets {
					set := g.Sets[si].Set
					if set.Form.String() != rs.Form || len(set.Gains) != len(rs.Patterns) {
						t.Errorf("set %s: form %v with %d gains, scipy %s with %d", set.Name, set.Form, len(set.Gains), rs.Form, len(rs.Patterns))
						continue
					}
					for pi, rp := range rs.Patterns {
						pg := set.Gains[pi]
						what := fmt.Sprintf("set %s outputs %s", set.Name, strings.Join(rp.Outputs, "+"))
						for _, m := range []struct {
							name string
							got  mat.Matrix
							want [][]float64
						}{{"S", pg.S, rp.S}, {"P", pg.P, rp.P}, {"L", pg.L, rp.L}} {
							if m.want == nil {
								continue
							}
							if m.got == nil {
								t.Errorf("%s: no %s", what, m.name)
								continue
							}
							if e := matRelErr(m.got, m.want); e > 1e-7 {
								t.Errorf("%s: %s differs from scipy by %.3g of its largest entry", what, m.name, e)
							}
						}
					}
				}
			})
		}
	}
}

// matRelErr returns max|got − want| over max|want|.
func matRelErr(got mat.Matrix, want [][]float64) float64 {
	r, c := got.Dims()
	if r != len(want) || (r > 0 && c != len(want[0])) {
		return math.Inf(1)
	}
	var diff, scale float64
	for i := range want {
		for j := range want[i] {
			diff = math.Max(diff, math.Abs(got.At(i, j)-want[i][j]))
			scale = math.Max(scale, math.Abs(want[i][j]))
		}
	}
	return diff / math.Max(scale, math.SmallestNonzeroFloat64)
}
