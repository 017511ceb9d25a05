package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"math"
	"math/cmplx"
	"sort"
	"strings"
	"text/tabwriter"
	"unicode/utf8"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/estimator"
)

const checkSynopsis = `[--json] plant.yaml [gains.yaml]

Reports how the plant's model was discretised, its matrices, the eigenvalues of
A with their time constants, the observability of both observer forms, the
wiring and the noise, and, for a gains file, the error dynamics of every gain
set. Without a gains argument the plant's own gains file is read when it exists.

Exit status: 0 when an estimator can run on this model (detectable in the
forms the gain sets use, and every gain set valid; without a gains file, when
the model is detectable), 1 when it cannot (the reasons end the report) or a
file is invalid, 2 for a usage error.

--json prints the same report as one JSON object, for scripts. Its keys:
"plant" and "file"; "fingerprint" (the model's sha256); "model" (sample
period "sample_seconds", "discretisation", the states, inputs and outputs with
their units and nominal values, and the discrete matrices "A", "B", "C", "D"
as arrays of rows); "eigenvalues" (each with "re", "im", "abs", "kind" and
"time_constant_seconds", null for a mode that does not decay);
"observability" ("prediction" and "current", each with "rank", "observable",
"detectable" and per mode "sigma_min", the scaled smallest singular value, 0
when unseen); "wiring" (one entry per signal: subject, unit, range, maximum
age); "noise"; "settings"; "gains" (null without a gains file; else its
"active" and "candidate" names, "errors", and per set its form, provenance
and, per output pattern, the error-dynamics "poles", "spectral_radius" and
"convergence_seconds", the slowest error mode's time constant); "can_run"
(true or false, as the exit status says); "problems" and "notes" (the
sentences that end the text report). Numbers are rounded to ten significant
digits.`

func runCheck(_ context.Context, e *env, args []string) error {
	fs := newFlags(e, "check", checkSynopsis)
	asJSON := fs.Bool("json", false, "print the report as one JSON object (its keys are listed above)")
	pos, err := parseArgs(fs, args)
	if err != nil {
		return err
	}
	if len(pos) < 1 || len(pos) > 2 {
		return usageError("want a plant file and at most one gains file, got %d arguments", len(pos))
	}
	plant, err := config.LoadPlant(pos[0])
	if err != nil {
		// Config errors are one "file:line:column: field: message" per line;
		// print them as they are.
		fmt.Fprintln(e.stderr, err)
		return &exitError{code: 1}
	}
	gainsPath, explicit := plant.GainsPath, false
	if len(pos) == 2 {
		gainsPath, explicit = pos[1], true
	}
	rep := buildCheckReport(plant, gainsPath, explicit)
	if *asJSON {
		enc := json.NewEncoder(e.stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(rep); err != nil {
			return fmt.Errorf("write report: %w", err)
		}
	} else {
		writeCheckText(e.stdout, rep)
	}
	if !rep.CanRun {
		return &exitError{code: 1}
	}
	return nil
}

// checkReport is what `surmise check` reports, and exactly what
// `surmise check --json` prints. The JSON field names are a stable interface:
// fields may be added, none renamed or removed. Numbers are rounded to ten
// significant digits (the gains file keeps full precision); times are in
// seconds; eigenvalues are {re, im, abs}, an imaginary part below
// 1e-6·max(1, |λ|) reported as 0 (see snap).
type checkReport struct {
	// Plant is the plant's name, File the plant file as given.
	Plant string `json:"plant"`
	File  string `json:"file"`
	// Fingerprint identifies the discrete model (config.Fingerprint); a gains
	// file carries the fingerprint of the model it was designed for.
	Fingerprint string `json:"fingerprint"`
	// Model is the discrete model the estimator runs and how it was obtained.
	Model modelReport `json:"model"`
	// Eigenvalues are those of the discrete A, largest modulus first, each
	// complex-conjugate pair with its positive member first.
	Eigenvalues []eigenReport `json:"eigenvalues"`
	// Observability is the test of both observer forms.
	Observability struct {
		// Prediction is the pair (A, C): the prediction form, and the
		// Kalman filter.
		Prediction formObservability `json:"prediction"`
		// Current is the pair (A, C·A): the current form.
		Current formObservability `json:"current"`
	} `json:"observability"`
	// Wiring is one entry per input, then per output.
	Wiring []wireReport `json:"wiring"`
	// Noise summarises the process and measurement noise.
	Noise noiseReport `json:"noise"`
	// Settings are the plant file's run-time settings.
	Settings settingsReport `json:"settings"`
	// Gains is the gains file that was read; null when there was none.
	Gains *gainsReport `json:"gains"`
	// CanRun is the verdict: the exit status is 0 when it is true.
	CanRun bool `json:"can_run"`
	// Problems are the reasons CanRun is false (empty when it is true).
	Problems []string `json:"problems"`
	// Notes are remarks that do not stop the estimator.
	Notes []string `json:"notes"`
}

// modelReport is the discrete model and its origin.
type modelReport struct {
	// Time is how the file gave the model: "continuous" or "discrete".
	Time string `json:"time"`
	// Discretisation says in words how the discrete model was obtained.
	Discretisation string `json:"discretisation"`
	// ProcessNoise is how the file gave the process noise: "continuous" (a
	// spectral density, discretised by Van Loan's method) or "discrete" (a
	// covariance per sample).
	ProcessNoise string `json:"process_noise"`
	// SampleSeconds is Ts.
	SampleSeconds float64 `json:"sample_seconds"`
	// States, Inputs and Outputs name the rows and columns of the matrices.
	States  []signalReport `json:"states"`
	Inputs  []signalReport `json:"inputs"`
	Outputs []signalReport `json:"outputs"`
	// A, B, C, D are the discrete matrices as lists of rows.
	A [][]float64 `json:"A"`
	B [][]float64 `json:"B"`
	C [][]float64 `json:"C"`
	D [][]float64 `json:"D"`
}

// signalReport is a state, input or output: name, unit, operating point.
type signalReport struct {
	Name    string  `json:"name"`
	Unit    string  `json:"unit"`
	Nominal float64 `json:"nominal"`
}

// eigenReport is one eigenvalue of A.
type eigenReport struct {
	Re  float64 `json:"re"`
	Im  float64 `json:"im"`
	Abs float64 `json:"abs"`
	// Kind is "stable", "deadbeat" (λ = 0), "integrator" (λ = 1),
	// "marginal" (elsewhere on the unit circle) or "unstable".
	Kind string `json:"kind"`
	// TimeConstantSeconds is the continuous-equivalent time constant
	// −Ts/ln|λ| of a stable mode, the e-folding growth time Ts/ln|λ| of an
	// unstable one; null for λ = 0 and on the unit circle.
	TimeConstantSeconds *float64 `json:"time_constant_seconds"`
	// PeriodSeconds is the oscillation period 2π·Ts/|arg λ| of a complex
	// eigenvalue (2·Ts for a negative real one, which alternates in sign);
	// null otherwise.
	PeriodSeconds *float64 `json:"period_seconds"`
}

// formObservability is CheckObservability of one pair.
type formObservability struct {
	// Pair is "(A, C)" or "(A, C·A)".
	Pair string `json:"pair"`
	// Rank is the numerical rank of the observability matrix, of States.
	Rank   int `json:"rank"`
	States int `json:"states"`
	// Observable and Detectable are the verdicts of estimator.Observability.
	Observable bool `json:"observable"`
	Detectable bool `json:"detectable"`
	// Modes is the PBH test of each distinct eigenvalue.
	Modes []modeReport `json:"modes"`
}

// modeReport is one distinct eigenvalue of A and what the PBH test says.
type modeReport struct {
	Re  float64 `json:"re"`
	Im  float64 `json:"im"`
	Abs float64 `json:"abs"`
	// SigmaMin is the scaled smallest singular value of [λI − A; C]: 0 for
	// a mode the outputs do not see, up to 1 for one they see plainly.
	SigmaMin   float64 `json:"sigma_min"`
	Observable bool    `json:"observable"`
	Weak       bool    `json:"weak"`
	Stable     bool    `json:"stable"`
	// Involves names the states with a share of at least 0.1 in the mode's
	// direction (estimator.Mode.Direction), largest first.
	Involves []stateShare `json:"involves"`
}

// stateShare is a state's component in a mode's unit direction.
type stateShare struct {
	State string  `json:"state"`
	Share float64 `json:"share"`
}

// wireReport is one input or output on the bus.
type wireReport struct {
	Signal  string  `json:"signal"`
	Kind    string  `json:"kind"` // "input" or "output"
	Subject string  `json:"subject"`
	Unit    string  `json:"unit"`
	Nominal float64 `json:"nominal"`
	// MaxAgeSeconds is the age beyond which a sample is stale.
	MaxAgeSeconds float64 `json:"max_age_seconds"`
	// Range is [lo, hi]; null when the signal has none.
	Range []float64 `json:"range"`
}

// noiseReport summarises the noise covariances.
type noiseReport struct {
	// ProcessDensityStd is √diag of the continuous spectral density Qc
	// (units/√s), when the file gave one; null otherwise.
	ProcessDensityStd []float64 `json:"process_density_std"`
	// ProcessStd is √diag of the discrete Q: the standard deviation of one
	// sample's process noise, per state.
	ProcessStd []float64 `json:"process_std"`
	// ProcessCorrelated is true when Q has off-diagonal entries.
	ProcessCorrelated bool `json:"process_correlated"`
	// MeasurementStd is √diag of R, per output.
	MeasurementStd []float64 `json:"measurement_std"`
	// MeasurementCorrelated is true when R has off-diagonal entries.
	MeasurementCorrelated bool `json:"measurement_correlated"`
}

// settingsReport is the plant file's run-time settings.
type settingsReport struct {
	GainsFile string  `json:"gains_file"`
	Gate      float64 `json:"gate"`
	Window    int     `json:"window"`
	Publish   string  `json:"publish"`
}

// gainsReport is a gains file and the error dynamics of its sets.
type gainsReport struct {
	// File is the gains file; FromPlant is true when it is the plant's own
	// (no gains argument was given).
	File      string `json:"file"`
	FromPlant bool   `json:"from_plant"`
	// Errors are the problems config found in the file, each
	// "file:line:column: field: message"; when there are any, Sets is empty.
	Errors    []string    `json:"errors"`
	Active    string      `json:"active"`
	Candidate string      `json:"candidate"`
	Sets      []setReport `json:"sets"`
}

// setReport is one gain set.
type setReport struct {
	Name string `json:"name"`
	// Role is "active", "candidate" or "".
	Role string `json:"role"`
	Form string `json:"form"`
	// Method, Created, Tool, Note, Factor and RequestedPoles are the
	// set's provenance.
	Method         string   `json:"method"`
	Created        string   `json:"created"`
	Tool           string   `json:"tool"`
	Note           string   `json:"note"`
	Factor         float64  `json:"factor"`
	RequestedPoles []string `json:"requested_poles"`
	// Patterns are the gains of a fixed-gain set, the one for all outputs
	// first; for a kalman set, one entry: its steady state for all outputs.
	Patterns []patternReport `json:"patterns"`
	// Uncovered lists the subsets of outputs without a gain of their own
	// for which (A, C) is detectable: on a tick with only those outputs the
	// estimator predicts without correcting. Null for a kalman set, which
	// corrects with any subset, and for plants with more than 10 outputs.
	Uncovered [][]string `json:"uncovered"`
	// Error is why estimator.Prepare refuses the set; "" when it accepts it.
	Error string `json:"error"`
}

// patternReport is the error dynamics of one gain.
type patternReport struct {
	Outputs []string `json:"outputs"`
	// Poles are the eigenvalues of the error dynamics, computed here.
	Poles []poleReport `json:"poles"`
	// SpectralRadius is the largest |pole|.
	SpectralRadius float64 `json:"spectral_radius"`
	// ConvergenceSeconds is −Ts/ln(SpectralRadius), the time constant of the
	// slowest error mode; null when the dynamics are not stable.
	ConvergenceSeconds *float64 `json:"convergence_seconds"`
	// NIS is true when the gain has its innovation covariance S, which makes
	// NIS, the consistency checks and the outlier gate available.
	NIS bool `json:"nis"`
}

// poleReport is one eigenvalue.
type poleReport struct {
	Re  float64 `json:"re"`
	Im  float64 `json:"im"`
	Abs float64 `json:"abs"`
}

// snap reports an eigenvalue whose imaginary part is below
// 1e-6·max(1, |λ|) as real: that is the scatter rounding gives a repeated
// real eigenvalue (a double pole at 0.5 comes out as 0.5 ± 5e-9i), not an
// oscillation.
func snap(l complex128) complex128 {
	if math.Abs(imag(l)) < 1e-6*math.Max(1, cmplx.Abs(l)) {
		return complex(real(l), 0)
	}
	return l
}

// unitTol is how close to the unit circle (or to 0) an eigenvalue's modulus
// must be to be called an integrator or marginal (deadbeat).
const unitTol = 1e-9

func buildCheckReport(plant *config.Plant, gainsPath string, explicit bool) *checkReport {
	md := plant.Model
	rep := &checkReport{
		Plant:       plant.Name,
		File:        plant.Path,
		Fingerprint: config.Fingerprint(md),
		Problems:    []string{},
		Notes:       []string{},
	}

	// The model.
	mr := &rep.Model
	mr.SampleSeconds = md.Ts
	if plant.Continuous != nil {
		mr.Time = "continuous"
		mr.Discretisation = fmt.Sprintf("continuous A, B discretised by zero-order hold at Ts = %s (matrix exponential); C, D as given", fnum(md.Ts)+" s")
		if plant.Continuous.Qc != nil {
			mr.ProcessNoise = "continuous"
		} else {
			mr.ProcessNoise = "discrete"
		}
	} else {
		mr.Time = "discrete"
		mr.Discretisation = fmt.Sprintf("given in discrete time at Ts = %s", fnum(md.Ts)+" s")
		mr.ProcessNoise = "discrete"
	}
	mr.States = signals(md.States, md.X0)
	mr.Inputs = signals(md.Inputs, md.U0)
	mr.Outputs = signals(md.Outputs, md.Y0)
	mr.A, mr.B, mr.C, mr.D = rows(md.A), rows(md.B), rows(md.C), rows(md.D)

	// Eigenvalues.
	for _, l := range estimator.Eigenvalues(md.A) {
		rep.Eigenvalues = append(rep.Eigenvalues, eigen(l, md.Ts))
	}
	if len(rep.Eigenvalues) == 0 {
		rep.Problems = append(rep.Problems, "the eigenvalues of A could not be computed")
	}

	// Observability of both forms.
	stateNames := names(md.States)
	obsP := estimator.CheckObservability(md.A, md.C)
	obsC := estimator.CheckObservability(md.A, estimator.CurrentFormOutput(md.A, md.C))
	rep.Observability.Prediction = formObs("(A, C)", obsP, stateNames)
	rep.Observability.Current = formObs("(A, C·A)", obsC, stateNames)
	for _, f := range []struct {
		name string
		o    formObservability
	}{{"prediction", rep.Observability.Prediction}, {"current", rep.Observability.Current}} {
		for _, m := range f.o.Modes {
			if m.Weak {
				rep.Notes = append(rep.Notes, fmt.Sprintf("%s form %s: mode %s is only weakly observable (σ %.2g); its gain will be large and noise-sensitive", f.name, f.o.Pair, fpole(complex(m.Re, m.Im)), m.SigmaMin))
			}
		}
	}

	// Wiring.
	for _, list := range []struct {
		kind  string
		wires []config.Wire
		nom   []float64
	}{{"input", plant.Inputs, md.U0}, {"output", plant.Outputs, md.Y0}} {
		for i, w := range list.wires {
			wr := wireReport{Signal: w.Signal, Kind: list.kind, Subject: w.Subject, Unit: w.Unit,
				MaxAgeSeconds: round10(w.MaxAge.Seconds())}
			if i < len(list.nom) {
				wr.Nominal = round10(list.nom[i])
			}
			if w.HasRange {
				wr.Range = []float64{round10(w.Min), round10(w.Max)}
			}
			rep.Wiring = append(rep.Wiring, wr)
		}
	}

	// Noise.
	nr := &rep.Noise
	if plant.Continuous != nil && plant.Continuous.Qc != nil {
		nr.ProcessDensityStd, _ = diagStd(plant.Continuous.Qc)
	}
	if md.Q != nil {
		nr.ProcessStd, nr.ProcessCorrelated = diagStd(md.Q)
	}
	if md.R != nil {
		nr.MeasurementStd, nr.MeasurementCorrelated = diagStd(md.R)
	}

	rep.Settings = settingsReport{GainsFile: plant.GainsPath, Gate: plant.Gate, Window: plant.Window, Publish: plant.Publish}

	// The gains file.
	gains, gerr := config.LoadGains(gainsPath, plant)
	switch {
	case gerr != nil && !explicit && errors.Is(gerr, fs.ErrNotExist):
		// No gains yet: judge the model alone.
		if !obsP.Detectable {
			rep.Problems = append(rep.Problems, undetected("the prediction form and the Kalman filter", rep.Observability.Prediction))
		}
		if !obsC.Detectable {
			rep.Problems = append(rep.Problems, undetected("the current form", rep.Observability.Current))
		}
		rep.Notes = append(rep.Notes, fmt.Sprintf("no gains file yet (%s): surmise design writes it", gainsPath))
	case gerr != nil:
		gr := &gainsReport{File: gainsPath, FromPlant: !explicit, Sets: []setReport{}}
		var el *config.ErrorList
		if errors.As(gerr, &el) {
			for _, fe := range el.Errors {
				gr.Errors = append(gr.Errors, fe.Error())
			}
		} else {
			gr.Errors = []string{gerr.Error()}
		}
		rep.Gains = gr
		rep.Problems = append(rep.Problems, fmt.Sprintf("the gains file %s is refused (%d problem(s), listed above)", gainsPath, len(gr.Errors)))
	default:
		rep.Gains = gainsSection(plant, gains, gainsPath, explicit, obsP, obsC, rep)
	}
	rep.CanRun = len(rep.Problems) == 0
	return rep
}

// gainsSection reports each gain set of a parsed gains file and adds the
// problems that stop the estimator to rep.
func gainsSection(plant *config.Plant, g *config.GainsFile, path string, explicit bool, obsP, obsC estimator.Observability, rep *checkReport) *gainsReport {
	md := plant.Model
	_, _, p := md.Dims()
	gr := &gainsReport{File: path, FromPlant: !explicit, Errors: []string{}, Active: g.Active, Candidate: g.Candidate}
	outNames := names(md.Outputs)
	for _, ns := range g.Sets {
		s := ns.Set
		sr := setReport{Name: s.Name, Form: s.Form.String(), Method: ns.Provenance.Method,
			Tool: ns.Provenance.Tool, Note: ns.Provenance.Note, Factor: round10(ns.Provenance.Factor)}
		switch s.Name {
		case g.Active:
			sr.Role = "active"
		case g.Candidate:
			sr.Role = "candidate"
		}
		if !ns.Provenance.Created.IsZero() {
			sr.Created = ns.Provenance.Created.UTC().Format("2006-01-02T15:04:05Z07:00")
		}
		for _, pl := range ns.Provenance.Poles {
			sr.RequestedPoles = append(sr.RequestedPoles, fpole(pl))
		}
		who := fmt.Sprintf("gain set %q (%s form)", s.Name, s.Form)
		if sr.Role != "" {
			who = fmt.Sprintf("the %s gain set %q (%s form)", sr.Role, s.Name, s.Form)
		}

		// Detectability in the form the set uses.
		switch {
		case s.Form == estimator.Current && !obsC.Detectable:
			rep.Problems = append(rep.Problems, who+": "+undetected("the current form", rep.Observability.Current))
		case s.Form != estimator.Current && !obsP.Detectable:
			rep.Problems = append(rep.Problems, who+": "+undetected("the "+s.Form.String()+" form", rep.Observability.Prediction))
		}
		if _, err := estimator.Prepare(md, s, plant.Gate); err != nil {
			sr.Error = err.Error()
			rep.Problems = append(rep.Problems, who+" is refused: "+err.Error())
		}

		switch s.Form {
		case estimator.Prediction, estimator.Current:
			covered := map[estimator.Pattern]bool{}
			for _, pg := range s.Gains {
				covered[pg.Outputs] = true
				cs := estimator.OutputRows(md.C, pg.Outputs)
				poles := estimator.Eigenvalues(estimator.ErrorDynamics(md.A, cs, pg.L, s.Form))
				sr.Patterns = append(sr.Patterns, pattern(pg.Outputs, outNames, poles, md.Ts, pg.S != nil))
			}
			if p <= 10 {
				sr.Uncovered = [][]string{}
				for pat := estimator.Pattern(1); pat < estimator.FullPattern(p); pat++ {
					if covered[pat] {
						continue
					}
					if estimator.CheckObservability(md.A, estimator.OutputRows(md.C, pat)).Detectable {
						sr.Uncovered = append(sr.Uncovered, patternNames(pat, outNames))
					}
				}
				if len(sr.Uncovered) > 0 && sr.Role == "active" {
					var list []string
					for _, u := range sr.Uncovered {
						list = append(list, strings.Join(u, "+"))
					}
					rep.Notes = append(rep.Notes, fmt.Sprintf("%s has no gain for the detectable output subset(s) %s: on such ticks it predicts without correcting (surmise design --patterns adds them)", who, strings.Join(list, ", ")))
				}
			}
		case estimator.Kalman:
			q, r := s.Q, s.R
			if q == nil {
				q = md.Q
			}
			if r == nil {
				r = md.R
			}
			if q != nil && r != nil {
				kg, err := estimator.SteadyStateKalman(md.A, md.C, q, r)
				if err != nil {
					rep.Notes = append(rep.Notes, fmt.Sprintf("%s has no steady state (%v); the time-varying filter still runs", who, err))
				} else {
					poles := estimator.Eigenvalues(estimator.ErrorDynamics(md.A, md.C, kg.Lp, estimator.Prediction))
					sr.Patterns = append(sr.Patterns, pattern(estimator.FullPattern(p), outNames, poles, md.Ts, true))
				}
			}
		}
		gr.Sets = append(gr.Sets, sr)
	}
	return gr
}

func pattern(pat estimator.Pattern, outNames []string, poles []complex128, ts float64, nis bool) patternReport {
	pr := patternReport{Outputs: patternNames(pat, outNames), NIS: nis, Poles: []poleReport{}}
	rho := math.Inf(1)
	if poles != nil {
		rho = 0
		for _, l := range poles {
			l = snap(l)
			pr.Poles = append(pr.Poles, poleReport{Re: round10(real(l)), Im: round10(imag(l)), Abs: round10(cmplx.Abs(l))})
			rho = math.Max(rho, cmplx.Abs(l))
		}
		pr.SpectralRadius = round10(rho)
	}
	if rho < 1 {
		t := round10(convergence(ts, rho))
		pr.ConvergenceSeconds = &t
	}
	return pr
}

func patternNames(pat estimator.Pattern, outNames []string) []string {
	var out []string
	for _, i := range pat.Indices(nil) {
		out = append(out, outNames[i])
	}
	return out
}

// undetected says which unstable or marginal modes the outputs of a pair do
// not see; used says who uses the pair.
func undetected(used string, o formObservability) string {
	var modes []string
	for _, m := range o.Modes {
		if !m.Observable && !m.Stable {
			kind := "unstable"
			if math.Abs(m.Abs-1) <= unitTol {
				kind = "marginal"
			}
			modes = append(modes, fmt.Sprintf("the %s mode %s (involving %s)", kind, fpole(complex(m.Re, m.Im)), involves(m.Involves)))
		}
	}
	if len(modes) == 0 {
		return fmt.Sprintf("%s, used by %s, is not detectable", o.Pair, used)
	}
	return fmt.Sprintf("%s, used by %s, is not detectable: the outputs do not see %s", o.Pair, used, strings.Join(modes, ", "))
}

func involves(s []stateShare) string {
	parts := make([]string, len(s))
	for i, x := range s {
		parts[i] = fmt.Sprintf("%s %.2f", x.State, x.Share)
	}
	return strings.Join(parts, ", ")
}

func signals(s []estimator.Signal, nominal []float64) []signalReport {
	out := make([]signalReport, len(s))
	for i, sg := range s {
		out[i] = signalReport{Name: sg.Name, Unit: sg.Unit}
		if i < len(nominal) {
			out[i].Nominal = round10(nominal[i])
		}
	}
	return out
}

func names(s []estimator.Signal) []string {
	out := make([]string, len(s))
	for i, sg := range s {
		out[i] = sg.Name
	}
	return out
}

func rows(m mat.Matrix) [][]float64 {
	r, c := m.Dims()
	out := make([][]float64, r)
	for i := range out {
		out[i] = make([]float64, c)
		for j := range out[i] {
			out[i][j] = round10(m.At(i, j))
		}
	}
	return out
}

func diagStd(s mat.Symmetric) ([]float64, bool) {
	n := s.SymmetricDim()
	out := make([]float64, n)
	corr := false
	for i := 0; i < n; i++ {
		out[i] = round10(math.Sqrt(math.Max(0, s.At(i, i))))
		for j := 0; j < i; j++ {
			if s.At(i, j) != 0 {
				corr = true
			}
		}
	}
	return out, corr
}

// eigen describes one eigenvalue of the discrete A.
func eigen(l complex128, ts float64) eigenReport {
	l = snap(l)
	abs := cmplx.Abs(l)
	er := eigenReport{Re: round10(real(l)), Im: round10(imag(l)), Abs: round10(abs)}
	switch {
	case abs <= unitTol:
		er.Kind = "deadbeat"
	case math.Abs(abs-1) <= unitTol && cmplx.Abs(l-1) <= unitTol:
		er.Kind = "integrator"
	case math.Abs(abs-1) <= unitTol:
		er.Kind = "marginal"
	case abs > 1:
		er.Kind = "unstable"
		t := round10(ts / math.Log(abs))
		er.TimeConstantSeconds = &t
	default:
		er.Kind = "stable"
		t := round10(-ts / math.Log(abs))
		er.TimeConstantSeconds = &t
	}
	if er.Kind != "deadbeat" {
		if arg := math.Abs(cmplx.Phase(l)); arg > 0 {
			t := round10(2 * math.Pi * ts / arg)
			er.PeriodSeconds = &t
		}
	}
	return er
}

// formObs turns CheckObservability into its report.
func formObs(pair string, o estimator.Observability, stateNames []string) formObservability {
	fo := formObservability{Pair: pair, Rank: o.Rank, States: o.N, Observable: o.Observable, Detectable: o.Detectable, Modes: []modeReport{}}
	for _, m := range o.Modes {
		m.Eigenvalue = snap(m.Eigenvalue)
		mr := modeReport{Re: round10(real(m.Eigenvalue)), Im: round10(imag(m.Eigenvalue)), Abs: round10(cmplx.Abs(m.Eigenvalue)),
			SigmaMin: round10(m.SigmaMin), Observable: m.Observable, Weak: m.Weak, Stable: m.Stable, Involves: []stateShare{}}
		idx := make([]int, len(m.Direction))
		for i := range idx {
			idx[i] = i
		}
		sort.SliceStable(idx, func(a, b int) bool { return m.Direction[idx[a]] > m.Direction[idx[b]] })
		for _, i := range idx {
			if m.Direction[i] >= 0.1 && i < len(stateNames) {
				mr.Involves = append(mr.Involves, stateShare{State: stateNames[i], Share: math.Round(m.Direction[i]*1000) / 1000})
			}
		}
		fo.Modes = append(fo.Modes, mr)
	}
	// The order of the eigenvalue table: largest modulus first, then
	// largest real part, positive imaginary part first.
	sort.SliceStable(fo.Modes, func(i, j int) bool {
		a, b := fo.Modes[i], fo.Modes[j]
		if a.Abs != b.Abs {
			return a.Abs > b.Abs
		}
		if a.Re != b.Re {
			return a.Re > b.Re
		}
		return a.Im > b.Im
	})
	return fo
}

// writeCheckText renders the report for a terminal.
func writeCheckText(out io.Writer, r *checkReport) {
	var buf bytes.Buffer
	defer func() { out.Write(trimLines(buf.Bytes())) }()
	w := &buf
	pf := func(format string, args ...any) { fmt.Fprintf(w, format, args...) }
	m := &r.Model
	pf("%-14s %s (%s)\n", "plant", r.Plant, r.File)
	pf("%-14s %s, %s, %s; %s\n", "model", plural(len(m.States), "state"), plural(len(m.Inputs), "input"), plural(len(m.Outputs), "output"), m.Discretisation)
	switch {
	case m.Time == "continuous" && m.ProcessNoise == "continuous":
		pf("%-14s spectral density discretised by Van Loan's method\n", "process noise")
	default:
		pf("%-14s given as a covariance per sample\n", "process noise")
	}
	pf("%-14s %s\n", "fingerprint", r.Fingerprint)

	stateN, inN, outN := sigNames(m.States), sigNames(m.Inputs), sigNames(m.Outputs)
	pf("\nDiscrete model  x(k+1) = A·x(k) + B·u(k),  y(k) = C·x(k) + D·u(k)  (deviations from nominal)\n")
	pf("\nA\n")
	writeMatrix(w, m.A, stateN, stateN)
	pf("\nB\n")
	writeMatrix(w, m.B, stateN, inN)
	pf("\nC\n")
	writeMatrix(w, m.C, outN, stateN)
	pf("\nD\n")
	writeMatrix(w, m.D, outN, inN)

	pf("\nEigenvalues of A (continuous-equivalent time constant −Ts/ln|λ|)\n")
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "  λ\t|λ|\ttime constant\tnote")
	for i := 0; i < len(r.Eigenvalues); i++ {
		e := r.Eigenvalues[i]
		l := complex(e.Re, e.Im)
		if e.Im > 0 && i+1 < len(r.Eigenvalues) && r.Eigenvalues[i+1].Re == e.Re && r.Eigenvalues[i+1].Im == -e.Im {
			i++ // the conjugate, shown with this one
		}
		var tc, note string
		switch e.Kind {
		case "deadbeat":
			tc, note = "0", "deadbeat: gone after one sample"
		case "integrator":
			tc, note = "—", "integrator"
		case "marginal":
			tc, note = "—", "on the unit circle: undamped"
		case "unstable":
			tc, note = "—", "UNSTABLE: grows ×e every "+fsec(*e.TimeConstantSeconds)
		default:
			tc = fsec(*e.TimeConstantSeconds)
		}
		if e.PeriodSeconds != nil {
			if note != "" {
				note += "; "
			}
			if e.Im == 0 {
				note += "alternates in sign every sample"
			} else {
				note += "oscillates, period " + fsec(*e.PeriodSeconds)
			}
		}
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\n", fpair(l), fnum(e.Abs), tc, note)
	}
	tw.Flush()

	pf("\nObservability (PBH test per mode: σ is the scaled smallest singular value of [λI − A; C], 0 = unseen)\n")
	pr, cu := &r.Observability.Prediction, &r.Observability.Current
	for _, f := range []*formObservability{pr, cu} {
		name := "prediction form"
		if f == cu {
			name = "current form"
		}
		verdict := "observable"
		switch {
		case !f.Observable && f.Detectable:
			verdict = "NOT observable, but detectable (the unseen modes decay by themselves)"
		case !f.Observable:
			verdict = "NOT observable and NOT detectable"
		}
		pf("  %-16s %-9s  rank %d of %d: %s\n", name, f.Pair, f.Rank, f.States, verdict)
	}
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "  mode\tσ "+pr.Pair+"\tσ "+cu.Pair+"\tstates involved (unit-vector components)")
	sameModes := len(pr.Modes) == len(cu.Modes)
	for i := 0; sameModes && i < len(pr.Modes); i++ {
		sameModes = pr.Modes[i].Re == cu.Modes[i].Re && pr.Modes[i].Im == cu.Modes[i].Im
	}
	for i, md := range pr.Modes {
		if md.Im < 0 {
			continue // the conjugate of the previous mode
		}
		other := "—"
		if sameModes {
			other = modeVerdict(cu.Modes[i])
		}
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\n", fpair(complex(md.Re, md.Im)), modeVerdict(md), other, involves(md.Involves))
	}
	if !sameModes {
		for _, md := range cu.Modes {
			if md.Im < 0 {
				continue
			}
			fmt.Fprintf(tw, "  %s\t—\t%s\t%s\n", fpair(complex(md.Re, md.Im)), modeVerdict(md), involves(md.Involves))
		}
	}
	tw.Flush()

	pf("\nWiring\n")
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "  signal\t\tsubject\tunit\tnominal\tmax_age\trange")
	for _, wr := range r.Wiring {
		rng := "—"
		if wr.Range != nil {
			rng = fmt.Sprintf("[%s, %s]", fnum(wr.Range[0]), fnum(wr.Range[1]))
		}
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\t%s\t%s\t%s\n", wr.Signal, wr.Kind, wr.Subject, orDash(wr.Unit), fnum(wr.Nominal), fsec(wr.MaxAgeSeconds), rng)
	}
	tw.Flush()

	pf("\nNoise (standard deviations)\n")
	n := &r.Noise
	if n.ProcessDensityStd != nil {
		pf("  process, spectral density (per √s):  %s\n", perSignal(n.ProcessDensityStd, m.States, "/√s"))
	}
	corr := ""
	if n.ProcessCorrelated {
		corr = " (correlated)"
	}
	pf("  process, per sample%s:  %s\n", corr, perSignal(n.ProcessStd, m.States, ""))
	corr = ""
	if n.MeasurementCorrelated {
		corr = " (correlated)"
	}
	pf("  measurement, per sample%s:  %s\n", corr, perSignal(n.MeasurementStd, m.Outputs, ""))

	s := &r.Settings
	pf("\nSettings\n  gains file %s; outlier gate %s; NIS window %d ticks; estimates on %s.estimate\n",
		s.GainsFile, gateText(s.Gate), s.Window, s.Publish)

	if g := r.Gains; g != nil {
		from := ""
		if g.FromPlant {
			from = " (the plant's gains file)"
		}
		pf("\nGain sets in %s%s\n", g.File, from)
		for _, e := range g.Errors {
			pf("  %s\n", e)
		}
		for _, sr := range g.Sets {
			role := ""
			if sr.Role != "" {
				role = " (" + sr.Role + ")"
			}
			pf("  %s%s: %s form, method %s", sr.Name, role, sr.Form, sr.Method)
			if len(sr.RequestedPoles) > 0 {
				pf(", requested poles %s", strings.Join(sr.RequestedPoles, ", "))
			}
			if sr.Factor != 0 {
				pf(", factor %s", fnum(sr.Factor))
			}
			if sr.Created != "" {
				pf(", created %s", sr.Created)
			}
			if sr.Tool != "" {
				pf(", by %s", sr.Tool)
			}
			pf("\n")
			if sr.Note != "" {
				pf("    note: %s\n", sr.Note)
			}
			if sr.Form == "kalman" && len(sr.Patterns) > 0 {
				pf("    time-varying gain for whichever outputs are present; its steady state:\n")
			}
			writePatternTable(w, "    ", sr.Patterns)
			if len(sr.Uncovered) > 0 {
				var list []string
				for _, u := range sr.Uncovered {
					list = append(list, strings.Join(u, "+"))
				}
				pf("    no gain for: %s (such ticks predict only)\n", strings.Join(list, ", "))
			}
			if sr.Error != "" {
				pf("    REFUSED: %s\n", sr.Error)
			}
		}
	}

	if len(r.Notes) > 0 {
		pf("\nNotes\n")
		for _, note := range r.Notes {
			pf("  - %s\n", note)
		}
	}
	if r.CanRun {
		if r.Gains != nil {
			pf("\nOK: the estimator can run with these gains.\n")
		} else {
			pf("\nOK: the model is fit for an estimator; design its gains next.\n")
		}
		return
	}
	pf("\nThe estimator cannot run:\n")
	for _, pb := range r.Problems {
		pf("  - %s\n", pb)
	}
}

// writePatternTable prints the error dynamics of a gain set's gains, one
// line per output pattern.
func writePatternTable(w io.Writer, indent string, pts []patternReport) {
	if len(pts) == 0 {
		return
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, indent+"outputs\tspectral radius\terror time constant\tNIS\terror-dynamics eigenvalues")
	for _, pt := range pts {
		conv := "not stable"
		if pt.ConvergenceSeconds != nil {
			conv = fsec(*pt.ConvergenceSeconds)
		}
		nis := "no (no S)"
		if pt.NIS {
			nis = "yes"
		}
		poles := make([]complex128, len(pt.Poles))
		for i, pl := range pt.Poles {
			poles[i] = complex(pl.Re, pl.Im)
		}
		fmt.Fprintf(tw, "%s%s\t%s\t%s\t%s\t%s\n", indent, strings.Join(pt.Outputs, "+"), fnum(pt.SpectralRadius), conv, nis, fpoles(poles))
	}
	tw.Flush()
}

// trimLines removes the trailing blanks tabwriter leaves on the lines of a
// table.
func trimLines(b []byte) []byte {
	lines := bytes.Split(b, []byte("\n"))
	for i, l := range lines {
		lines[i] = bytes.TrimRight(l, " ")
	}
	return bytes.Join(lines, []byte("\n"))
}

func plural(n int, word string) string {
	if n == 1 {
		return "1 " + word
	}
	return fmt.Sprintf("%d %ss", n, word)
}

func modeVerdict(m modeReport) string {
	s := fmt.Sprintf("%.2g", m.SigmaMin)
	switch {
	case !m.Observable && m.Stable:
		s += " unseen (decays)"
	case !m.Observable:
		s += " UNSEEN"
	case m.Weak:
		s += " weak"
	}
	return s
}

func gateText(g float64) string {
	if g == 0 {
		return "off"
	}
	return "at probability " + fnum(g)
}

func perSignal(v []float64, s []signalReport, perUnit string) string {
	parts := make([]string, len(v))
	for i, x := range v {
		unit := ""
		if i < len(s) && s[i].Unit != "" {
			unit = " " + s[i].Unit + perUnit
		}
		parts[i] = fmt.Sprintf("%s %s%s", s[i].Name, fnum(x), unit)
	}
	return strings.Join(parts, ", ")
}

func orDash(s string) string {
	if s == "" {
		return "—"
	}
	return s
}

func sigNames(s []signalReport) []string {
	out := make([]string, len(s))
	for i, x := range s {
		out[i] = x.Name
	}
	return out
}

// writeMatrix prints a matrix with its rows and columns named.
func writeMatrix(w io.Writer, m [][]float64, rowNames, colNames []string) {
	width := 0
	for _, r := range rowNames {
		width = max(width, utf8.RuneCountInString(r))
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintf(tw, "  %*s\t", width, "")
	for _, c := range colNames {
		fmt.Fprintf(tw, "%s\t", c)
	}
	fmt.Fprintln(tw)
	for i, row := range m {
		fmt.Fprintf(tw, "  %s%s\t", rowNames[i], strings.Repeat(" ", width-utf8.RuneCountInString(rowNames[i])))
		for _, x := range row {
			fmt.Fprintf(tw, "%s\t", fnum(x))
		}
		fmt.Fprintln(tw)
	}
	tw.Flush()
}
