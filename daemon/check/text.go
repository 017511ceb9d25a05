package check

import (
	"bytes"
	"fmt"
	"io"
	"strings"
	"text/tabwriter"
	"unicode/utf8"

	"surmise/estimator"
)

// Caution is the line printed under a report that says an estimator can
// run: what the estimates are and are not for.
const Caution = "Caution: estimates are a model's inference, not measurements, and an estimator is not a safety function: " +
	"interlocks and trips act on measured signals; commissioning follows local codes and licensed engineering practice."

// WriteText renders the report for a terminal.
func WriteText(out io.Writer, r *Report) {
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
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\n", fpair(l), FormatNum(e.Abs), tc, note)
	}
	tw.Flush()

	pf("\nObservability (PBH test per mode: σ is the smallest singular value of [λI − A; C] scaled by ‖A‖ + |λ| + ‖C‖;\n")
	unseen := 100 * float64(r.Observability.Prediction.States+len(r.Model.Outputs)) * 0x1p-52
	pf("  σ below the rounding tolerance 100·(n+p)·ε = %.2g (more for an ill-conditioned mode) = unseen;\n", unseen)
	pf("  below %s = weak: seen, but an observer gain for it is large and noise-sensitive)\n", FormatNum(estimator.WeakModeThreshold))
	pr, cu := &r.Observability.Prediction, &r.Observability.Current
	for _, f := range []*Form{pr, cu} {
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
			rng = fmt.Sprintf("[%s, %s]", FormatNum(wr.Range[0]), FormatNum(wr.Range[1]))
		}
		fmt.Fprintf(tw, "  %s\t%s\t%s\t%s\t%s\t%s\t%s\n", wr.Signal, wr.Kind, wr.Subject, orDash(wr.Unit), FormatNum(wr.Nominal), fsec(wr.MaxAgeSeconds), rng)
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
				pf(", factor %s", FormatNum(sr.Factor))
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
			WriteDynamics(w, "    ", sr.Patterns)
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
		pf("%s\n", Caution)
		return
	}
	pf("\nThe estimator cannot run:\n")
	for _, pb := range r.Problems {
		pf("  - %s\n", pb)
	}
}

// WriteDynamics prints the error dynamics of a gain set's gains as a table,
// one line per output pattern, each line starting with indent.
func WriteDynamics(w io.Writer, indent string, pts []Dynamics) {
	if len(pts) == 0 {
		return
	}
	var buf bytes.Buffer
	defer func() { w.Write(trimLines(buf.Bytes())) }()
	tw := tabwriter.NewWriter(&buf, 0, 0, 2, ' ', 0)
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
		fmt.Fprintf(tw, "%s%s\t%s\t%s\t%s\t%s\n", indent, strings.Join(pt.Outputs, "+"), FormatNum(pt.SpectralRadius), conv, nis, FormatPoles(poles))
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

func modeVerdict(m Mode) string {
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
	return "at probability " + FormatNum(g)
}

func perSignal(v []float64, s []Signal, perUnit string) string {
	parts := make([]string, len(v))
	for i, x := range v {
		unit := ""
		if i < len(s) && s[i].Unit != "" {
			unit = " " + s[i].Unit + perUnit
		}
		parts[i] = fmt.Sprintf("%s %s%s", s[i].Name, FormatNum(x), unit)
	}
	return strings.Join(parts, ", ")
}

func orDash(s string) string {
	if s == "" {
		return "—"
	}
	return s
}

func sigNames(s []Signal) []string {
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
			fmt.Fprintf(tw, "%s\t", FormatNum(x))
		}
		fmt.Fprintln(tw)
	}
	tw.Flush()
}
