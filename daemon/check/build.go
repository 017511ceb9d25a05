package check

import (
	"errors"
	"fmt"
	"io/fs"
	"math"
	"math/cmplx"
	"sort"
	"strings"

	"gonum.org/v1/gonum/mat"

	"surmise/config"
	"surmise/estimator"
)

// Build checks plant and the gains file at gainsPath against it. explicit
// says the gains file was named by the user: a missing one is then a
// problem, where a plant's own gains file that does not exist yet only
// leaves the model to be judged alone. Build does not fail: what is wrong
// is in the report's Problems, and CanRun is false.
func Build(plant *config.Plant, gainsPath string, explicit bool) *Report {
	md := plant.Model
	rep := &Report{
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
		mr.Discretisation = fmt.Sprintf("continuous A, B discretised by zero-order hold at Ts = %s (matrix exponential); C, D as given", FormatNum(md.Ts)+" s")
		if plant.Continuous.Qc != nil {
			mr.ProcessNoise = "continuous"
		} else {
			mr.ProcessNoise = "discrete"
		}
	} else {
		mr.Time = "discrete"
		mr.Discretisation = fmt.Sprintf("given in discrete time at Ts = %s", FormatNum(md.Ts)+" s")
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
		o    Form
	}{{"prediction", rep.Observability.Prediction}, {"current", rep.Observability.Current}} {
		for _, m := range f.o.Modes {
			if m.Weak {
				rep.Notes = append(rep.Notes, fmt.Sprintf("%s form %s: mode %s is only weakly observable (σ %.2g); its gain will be large and noise-sensitive", f.name, f.o.Pair, FormatPole(complex(m.Re, m.Im)), m.SigmaMin))
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
			wr := Wire{Signal: w.Signal, Kind: list.kind, Subject: w.Subject, Unit: w.Unit,
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

	rep.Settings = Settings{GainsFile: plant.GainsPath, Gate: plant.Gate, Window: plant.Window, Publish: plant.Publish}

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
		gr := &Gains{File: gainsPath, FromPlant: !explicit, Sets: []Set{}}
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
func gainsSection(plant *config.Plant, g *config.GainsFile, path string, explicit bool, obsP, obsC estimator.Observability, rep *Report) *Gains {
	md := plant.Model
	_, _, p := md.Dims()
	gr := &Gains{File: path, FromPlant: !explicit, Errors: []string{}, Active: g.Active, Candidate: g.Candidate}
	outputs := md.Outputs
	for _, ns := range g.Sets {
		s := ns.Set
		sr := Set{Name: s.Name, Form: s.Form.String(), Method: ns.Provenance.Method,
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
			sr.RequestedPoles = append(sr.RequestedPoles, FormatPole(pl))
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
				sr.Patterns = append(sr.Patterns, NewDynamics(pg.Outputs, outputs, poles, md.Ts, pg.S != nil))
			}
			if p <= 10 {
				sr.Uncovered = [][]string{}
				for pat := estimator.Pattern(1); pat < estimator.FullPattern(p); pat++ {
					if covered[pat] {
						continue
					}
					if estimator.CheckObservability(md.A, estimator.OutputRows(md.C, pat)).Detectable {
						sr.Uncovered = append(sr.Uncovered, PatternNames(pat, outputs))
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
					sr.Patterns = append(sr.Patterns, NewDynamics(estimator.FullPattern(p), outputs, poles, md.Ts, true))
				}
			}
		}
		gr.Sets = append(gr.Sets, sr)
	}
	return gr
}

// NewDynamics describes the error dynamics of the gain for the outputs in
// pat: its eigenvalues poles (nil when they could not be computed), their
// spectral radius and, when it is below 1, the time constant of the slowest
// error mode at sample time ts. nis says whether the gain carries the
// innovation covariance S.
func NewDynamics(pat estimator.Pattern, outputs []estimator.Signal, poles []complex128, ts float64, nis bool) Dynamics {
	pr := Dynamics{Outputs: PatternNames(pat, outputs), NIS: nis, Poles: []Pole{}}
	rho := math.Inf(1)
	if poles != nil {
		rho = 0
		for _, l := range poles {
			l = snap(l)
			pr.Poles = append(pr.Poles, Pole{Re: round10(real(l)), Im: round10(imag(l)), Abs: round10(cmplx.Abs(l))})
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

// PatternNames returns the names of the outputs in pat.
func PatternNames(pat estimator.Pattern, outputs []estimator.Signal) []string {
	var out []string
	for _, i := range pat.Indices(nil) {
		out = append(out, outputs[i].Name)
	}
	return out
}

// undetected says which unstable or marginal modes the outputs of a pair do
// not see; used says who uses the pair.
func undetected(used string, o Form) string {
	var modes []string
	for _, m := range o.Modes {
		if !m.Observable && !m.Stable {
			kind := "unstable"
			if math.Abs(m.Abs-1) <= unitTol {
				kind = "marginal"
			}
			modes = append(modes, fmt.Sprintf("the %s mode %s (involving %s)", kind, FormatPole(complex(m.Re, m.Im)), involves(m.Involves)))
		}
	}
	if len(modes) == 0 {
		return fmt.Sprintf("%s, used by %s, is not detectable", o.Pair, used)
	}
	return fmt.Sprintf("%s, used by %s, is not detectable: the outputs do not see %s", o.Pair, used, strings.Join(modes, ", "))
}

func involves(s []Share) string {
	parts := make([]string, len(s))
	for i, x := range s {
		parts[i] = fmt.Sprintf("%s %.2f", x.State, x.Share)
	}
	return strings.Join(parts, ", ")
}

func signals(s []estimator.Signal, nominal []float64) []Signal {
	out := make([]Signal, len(s))
	for i, sg := range s {
		out[i] = Signal{Name: sg.Name, Unit: sg.Unit}
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
func eigen(l complex128, ts float64) Eigenvalue {
	l = snap(l)
	abs := cmplx.Abs(l)
	er := Eigenvalue{Re: round10(real(l)), Im: round10(imag(l)), Abs: round10(abs)}
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
func formObs(pair string, o estimator.Observability, stateNames []string) Form {
	fo := Form{Pair: pair, Rank: o.Rank, States: o.N, Observable: o.Observable, Detectable: o.Detectable, Modes: []Mode{}}
	for _, m := range o.Modes {
		m.Eigenvalue = snap(m.Eigenvalue)
		mr := Mode{Re: round10(real(m.Eigenvalue)), Im: round10(imag(m.Eigenvalue)), Abs: round10(cmplx.Abs(m.Eigenvalue)),
			SigmaMin: round10(m.SigmaMin), Observable: m.Observable, Weak: m.Weak, Stable: m.Stable, Involves: []Share{}}
		idx := make([]int, len(m.Direction))
		for i := range idx {
			idx[i] = i
		}
		sort.SliceStable(idx, func(a, b int) bool { return m.Direction[idx[a]] > m.Direction[idx[b]] })
		for _, i := range idx {
			if m.Direction[i] >= 0.1 && i < len(stateNames) {
				mr.Involves = append(mr.Involves, Share{State: stateNames[i], Share: math.Round(m.Direction[i]*1000) / 1000})
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
