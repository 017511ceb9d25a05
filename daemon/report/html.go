package report

import (
	"fmt"
	"html/template"
	"image/color"
	"io"
	"math"
	"strconv"
	"strings"
	"time"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
)

// nisFloor is the smallest NIS drawn on the NIS plot's log scale; smaller
// values (a NIS can be 0) are drawn at it.
const nisFloor = 1e-3

// WriteHTML writes the replay report of in to w as one self-contained HTML
// page: a header, the summary table with the gain sets side by side, and
// inline SVG plots of the innovations, the NIS and the states. The page
// loads nothing from anywhere: no scripts, fonts or style sheets.
func WriteHTML(w io.Writer, in *Input) error {
	if err := in.Validate(); err != nil {
		return err
	}
	pg, err := buildPage(in)
	if err != nil {
		return err
	}
	t, err := template.New("report").Parse(pageTemplate)
	if err != nil {
		return fmt.Errorf("report: the page template: %w", err)
	}
	if err := t.Execute(w, pg); err != nil {
		return fmt.Errorf("report: writing the page: %w", err)
	}
	return nil
}

type page struct {
	Plant, Source string
	Start, End    string
	Duration      string
	Ticks         string
	Runs          []runView
	Sections      []tableSection
	Innovations   []plotView
	NIS           plotView
	States        []plotView
	HasTruth      bool
	HasStateStd   bool
	Buckets       int
	Colspan       int
	Lags          int
	Level         string
	HasFaults     bool
	Clipped       int
}

type runView struct {
	Gains, Form, Fingerprint string
	Color                    string
	Line                     template.CSS // the legend chip: colour and dash
}

type tableSection struct {
	Title string
	Rows  []tableRow
}

type tableRow struct {
	Label, Expected string
	Cells           []tableCell
	Small           bool
}

type tableCell struct {
	Text string
	Warn bool
}

type plotView struct {
	Title string
	SVG   template.HTML
}

func cssColor(c color.NRGBA) string { return fmt.Sprintf("#%02x%02x%02x", c.R, c.G, c.B) }

func num(v float64) string {
	if math.IsNaN(v) {
		return "—"
	}
	return strings.Replace(strconv.FormatFloat(v, 'g', 4, 64), "-", "−", 1)
}

func pct(v float64) string {
	if math.IsNaN(v) {
		return "—"
	}
	return fmt.Sprintf("%.1f %%", 100*v)
}

func count(n, of int) string {
	if of == 0 {
		return strconv.Itoa(n)
	}
	return fmt.Sprintf("%d (%.1f %%)", n, 100*float64(n)/float64(of))
}

// pval formats a p-value: small ones in scientific notation.
func pval(p float64) string {
	if p < 1e-3 && p > 0 {
		return strconv.FormatFloat(p, 'e', 1, 64)
	}
	return num(p)
}

// faultText lists fault episodes as "bias, reads high 45 s–65 s", times
// from the start of the run.
func faultText(eps []FaultEpisode, t0 time.Time) string {
	parts := make([]string, 0, len(eps))
	for _, e := range eps {
		parts = append(parts, fmt.Sprintf("%s %s–%s", FaultName(e.Kind), shortDur(e.Start.Sub(t0)), shortDur(e.End.Sub(t0))))
	}
	return strings.Join(parts, "; ")
}

func shortDur(d time.Duration) string { return d.Round(time.Second).String() }

func withUnit(name, unit string) string {
	if unit == "" {
		return name
	}
	return name + " (" + unit + ")"
}

func unitOf(units []string, i int) string {
	if units == nil {
		return ""
	}
	return units[i]
}

func buildPage(in *Input) (*page, error) {
	sums := Summarise(in)
	t0, t1 := sums[0].Start, sums[0].End
	total := 0
	for _, s := range sums {
		if s.Start.Before(t0) {
			t0 = s.Start
		}
		if s.End.After(t1) {
			t1 = s.End
		}
		total = max(total, s.Ticks)
	}
	pg := &page{
		Plant: in.Plant, Source: in.Source,
		Start:    t0.Format("2006-01-02 15:04:05.000 MST"),
		End:      t1.Format("2006-01-02 15:04:05.000 MST"),
		Duration: t1.Sub(t0).Round(time.Millisecond).String(),
		Ticks:    strconv.Itoa(total),
		HasTruth: in.Truth != nil,
		Buckets:  Buckets,
		Colspan:  len(in.Runs) + 2,
		Lags:     Lags,
		Level:    strconv.FormatFloat(WhitenessLevel, 'g', -1, 64),
	}
	for i, r := range in.Runs {
		fp := r.Fingerprint
		if len(fp) > 16 {
			fp = fp[:16] + "…"
		}
		pg.Runs = append(pg.Runs, runView{Gains: r.Gains, Form: r.Form, Fingerprint: fp, Color: cssColor(palette(i)),
			Line: template.CSS("background:" + dashCSS(i, cssColor(palette(i))))})
		if r.Ticks.StateStd != nil {
			pg.HasStateStd = true
		}
	}
	pg.Sections = tableSections(in, sums)
	if err := addPlots(pg, in, sums); err != nil {
		return nil, err
	}
	return pg, nil
}

func tableSections(in *Input, sums []Summary) []tableSection {
	row := func(label, expected string, f func(s *Summary) tableCell) tableRow {
		r := tableRow{Label: label, Expected: expected}
		for i := range sums {
			r.Cells = append(r.Cells, f(&sums[i]))
		}
		return r
	}
	plain := func(f func(s *Summary) string) func(s *Summary) tableCell {
		return func(s *Summary) tableCell { return tableCell{Text: f(s)} }
	}
	ticks := tableSection{Title: "Ticks"}
	ticks.Rows = append(ticks.Rows,
		row("ticks", "", plain(func(s *Summary) string { return strconv.Itoa(s.Ticks) })),
		row("tracking", "", plain(func(s *Summary) string { return count(s.Tracking, s.Ticks) })),
		row("coasting", "", plain(func(s *Summary) string { return count(s.Coasting, s.Ticks) })),
	)
	any := func(f func(s *Summary) int) bool {
		for i := range sums {
			if f(&sums[i]) > 0 {
				return true
			}
		}
		return false
	}
	if any(func(s *Summary) int { return s.StaleInput }) {
		ticks.Rows = append(ticks.Rows, row("stale input", "", plain(func(s *Summary) string { return count(s.StaleInput, s.Ticks) })))
	}
	if any(func(s *Summary) int { return s.Suspect }) {
		ticks.Rows = append(ticks.Rows, row("suspect", "", plain(func(s *Summary) string { return count(s.Suspect, s.Ticks) })))
	}
	if any(func(s *Summary) int { return s.Other }) {
		ticks.Rows = append(ticks.Rows, row("other status", "", plain(func(s *Summary) string { return count(s.Other, s.Ticks) })))
	}
	ticks.Rows = append(ticks.Rows, row("outliers rejected", "", plain(func(s *Summary) string { return strconv.Itoa(s.Outliers) })))

	nis := tableSection{Title: "Consistency (NIS)"}
	nis.Rows = append(nis.Rows,
		row("ticks with a NIS", "", plain(func(s *Summary) string { return strconv.Itoa(s.NISTicks) })),
		row("mean NIS", "mean dof", plain(func(s *Summary) string {
			return num(s.MeanNIS) + " (dof " + num(s.MeanDof) + ")"
		})),
		row("NIS inside its 95 % band", "95 %", func(s *Summary) tableCell {
			return tableCell{Text: pct(s.NISInBand), Warn: s.NISInBand < 0.9}
		}),
		row("windowed mean inside its band", "95 %", func(s *Summary) tableCell {
			return tableCell{Text: pct(s.WindowsInBand), Warn: s.WindowsInBand < 0.9}
		}),
	)
	var out []tableSection
	if in.Truth != nil {
		// What matters most when the truth is known: the error and whether
		// the claimed σ covers it — first.
		truth := tableSection{Title: "Against the true states: error RMS · share of ticks with |error| ≤ 2σ"}
		for i, name := range in.StateNames {
			truth.Rows = append(truth.Rows, row(withUnit(name, unitOf(in.StateUnits, i)), "· 95 %", func(s *Summary) tableCell {
				st := s.States[i]
				txt := num(st.RMS)
				if st.CoverageN > 0 {
					txt += " · " + pct(st.Coverage)
				}
				return tableCell{Text: txt, Warn: st.CoverageN > 0 && st.Coverage < 0.9}
			}))
		}
		out = append(out, truth)
	}
	out = append(out, ticks, nis)
	for j, name := range in.OutputNames {
		unit := unitOf(in.OutputUnits, j)
		sec := tableSection{Title: "Innovation of " + withUnit(name, unit)}
		sec.Rows = append(sec.Rows,
			row("values", "", plain(func(s *Summary) string { return strconv.Itoa(s.Outputs[j].N) })),
			row("mean", "0", plain(func(s *Summary) string { return num(s.Outputs[j].Mean) })),
			row("RMS", "", plain(func(s *Summary) string { return num(s.Outputs[j].RMS) })),
			row(fmt.Sprintf("Ljung–Box Q over lags 1–%d, p-value", Lags), fmt.Sprintf("p ≥ %g", WhitenessLevel), func(s *Summary) tableCell {
				o := s.Outputs[j]
				if o.Autocorr == nil {
					return tableCell{Text: "—"}
				}
				verdict := "white"
				if !o.White {
					verdict = "not white"
				}
				return tableCell{Text: fmt.Sprintf("Q %s, p %s (%s)", num(o.LjungBox), pval(o.P), verdict), Warn: !o.White}
			}),
			row("ticks without a sample", "", plain(func(s *Summary) string { return pct(s.Outputs[j].Dropout) })),
			row("sensor faults", "none", func(s *Summary) tableCell {
				o := s.Outputs[j]
				if o.Faults == nil {
					return tableCell{Text: "none"}
				}
				return tableCell{Text: faultText(o.Faults, s.Start), Warn: true}
			}),
		)
		r := row("ρ(1), …, ρ(10)", "", plain(func(s *Summary) string {
			o := s.Outputs[j]
			if o.Autocorr == nil {
				return "—"
			}
			parts := make([]string, len(o.Autocorr))
			for i, v := range o.Autocorr {
				parts[i] = strconv.FormatFloat(v, 'f', 3, 64)
			}
			return strings.ReplaceAll(strings.Join(parts, " "), "-", "−") + "  (±" + strconv.FormatFloat(o.Bound, 'f', 3, 64) + ")"
		}))
		r.Small = true
		sec.Rows = append(sec.Rows, r)
		out = append(out, sec)
	}
	return out
}

func addPlots(pg *page, in *Input, sums []Summary) error {
	ax := newTimeAxis(in)
	xs := make([][]float64, len(in.Runs))
	decs := make([]decimator, len(in.Runs))
	for i := range in.Runs {
		xs[i] = ax.xs(in.Runs[i].Ticks.Time)
		decs[i] = newDecimator(xs[i], Buckets)
	}
	render := func(f *figure, title string) (plotView, error) {
		// The same time range on every plot, so they line up.
		f.p.X.Min, f.p.X.Max = 0, ax.end
		s, err := f.svg()
		return plotView{Title: title, SVG: template.HTML(s)}, err
	}

	for j, name := range in.OutputNames {
		unit := unitOf(in.OutputUnits, j)
		title := "Innovation of " + withUnit(name, unit) + ", with ±2√S"
		f := newFigure(title, ax.label(), withUnit("innovation", unit))
		var vals, keep [][]float64
		segs := make([][]plotter.XYs, len(in.Runs))
		for i := range in.Runs {
			t := &in.Runs[i].Ticks
			vals = append(vals, t.Innovations[j])
			if t.InnovationStd != nil {
				keep = append(keep, scaled(t.InnovationStd[j], 2), scaled(t.InnovationStd[j], -2))
			}
			segs[i] = decs[i].lines(xs[i], t.Innovations[j])
			f.lines(segs[i], withAlpha(palette(i), 0xa0), 0.6, dashes(i)...)
		}
		// The claimed ±2√S on top, as edges: under a dense cloud of
		// innovations a filled band would not show.
		for i := range in.Runs {
			t := &in.Runs[i].Ticks
			if t.InnovationStd != nil {
				f.lines(edges(decs[i].band(xs[i], nil, t.InnovationStd[j], 2)), darker(palette(i)), 1.3, dashes(i)...)
			}
		}
		lo, hi := f.ymin, f.ymax
		if l, h, ok := robustRange(vals, keep); ok {
			lo, hi = l, h
			f.p.Y.Min, f.p.Y.Max = lo, hi
			for i := range in.Runs {
				pg.Clipped += f.clipMarks(segs[i], lo, hi, darker(palette(i)))
			}
		}
		// Fault episodes of each set as bars along the bottom.
		for i := range in.Runs {
			var bars [][2]float64
			for _, e := range sums[i].Outputs[j].Faults {
				x0, x1 := xs[i][e.From], xs[i][e.To]
				bars = append(bars, [2]float64{x0, math.Max(x1, x0+0.004*ax.end)})
			}
			if len(bars) > 0 {
				pg.HasFaults = true
				f.spans(bars, lo+(0.03+0.05*float64(i))*(hi-lo), darker(palette(i)))
			}
		}
		v, err := render(f, title)
		if err != nil {
			return err
		}
		pg.Innovations = append(pg.Innovations, v)
	}

	{
		title := "NIS: largest per time bucket, windowed mean and its 95 % band"
		f := newFigure(title, ax.label(), "NIS (log scale)")
		f.p.Y.Scale = plot.LogScale{}
		f.p.Y.Tick.Marker = plot.LogTicks{Prec: -1}
		clamp := func(segs []plotter.XYs) []plotter.XYs {
			for _, s := range segs {
				for k := range s {
					s[k].Y = math.Max(s[k].Y, nisFloor)
				}
			}
			return segs
		}
		for i := range in.Runs {
			f.lines(clamp(decs[i].upper(xs[i], in.Runs[i].Ticks.NIS)), withAlpha(palette(i), 0x60), 0.5)
		}
		for i := range in.Runs {
			t := &in.Runs[i].Ticks
			if t.NISMean == nil {
				continue
			}
			f.lines(clamp(decs[i].lines(xs[i], t.BandLo)), palette(i), 0.8, vg.Points(3), vg.Points(2))
			f.lines(clamp(decs[i].lines(xs[i], t.BandHi)), palette(i), 0.8, vg.Points(3), vg.Points(2))
			f.lines(clamp(decs[i].lines(xs[i], t.NISMean)), palette(i), 1.4, dashes(i)...)
		}
		switch {
		case f.points == 0:
			// No NIS at all (nothing measured): an empty log axis needs a
			// range of its own.
			f.p.Y.Min, f.p.Y.Max = 0.1, 10
		case f.ymin == f.ymax:
			// One value: gonum would widen the range by ±1, which can
			// cross zero on a log scale.
			f.p.Y.Min, f.p.Y.Max = f.ymin/10, f.ymax*10
		}
		v, err := render(f, title)
		if err != nil {
			return err
		}
		pg.NIS = v
	}

	for s, name := range in.StateNames {
		unit := unitOf(in.StateUnits, s)
		title := "State " + withUnit(name, unit)
		if pg.HasStateStd {
			title += ", with ±2σ"
		}
		f := newFigure(title, ax.label(), withUnit(name, unit))
		var vals, keep [][]float64
		segs := make([][]plotter.XYs, len(in.Runs))
		for i := range in.Runs {
			t := &in.Runs[i].Ticks
			vals = append(vals, t.States[s])
			if t.StateStd != nil {
				// The band, filled lightly, and its edges in the set's
				// colour and dash, so that bands of several sets stay
				// readable where they overlap.
				polys := decs[i].band(xs[i], t.States[s], t.StateStd[s], 2)
				f.bands(polys, withAlpha(palette(i), 0x22))
				f.lines(edges(polys), withAlpha(palette(i), 0xb0), 0.5, dashes(i)...)
				keep = append(keep, plus(t.States[s], t.StateStd[s], 2), plus(t.States[s], t.StateStd[s], -2))
			}
		}
		for i := range in.Runs {
			segs[i] = decs[i].lines(xs[i], in.Runs[i].Ticks.States[s])
			f.lines(segs[i], palette(i), 1, dashes(i)...)
		}
		if in.Truth != nil {
			vals = append(vals, in.Truth[s])
			f.lines(decs[0].lines(xs[0], in.Truth[s]), color.Gray{0x20}, 0.9, vg.Points(4), vg.Points(2))
		}
		if lo, hi, ok := robustRange(vals, keep); ok {
			f.p.Y.Min, f.p.Y.Max = lo, hi
			for i := range in.Runs {
				pg.Clipped += f.clipMarks(segs[i], lo, hi, darker(palette(i)))
			}
		}
		v, err := render(f, title)
		if err != nil {
			return err
		}
		pg.States = append(pg.States, v)
	}
	return nil
}

// scaled returns k·v.
func scaled(v []float64, k float64) []float64 {
	out := make([]float64, len(v))
	for i, x := range v {
		out[i] = k * x
	}
	return out
}

// plus returns c + k·s.
func plus(c, s []float64, k float64) []float64 {
	out := make([]float64, len(c))
	for i := range c {
		out[i] = c[i] + k*s[i]
	}
	return out
}

const pageTemplate = `<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Replay report — {{.Plant}}</title>
<style>
:root { --ink: #1d2329; --muted: #5b6670; --rule: #d8dde2; --warn: #b3261e; --warnbg: #fcebea; }
* { box-sizing: border-box; }
body { margin: 0; padding: 24px 32px 48px; color: var(--ink); background: #fff;
  font: 14px/1.45 "Liberation Sans", Arial, Helvetica, sans-serif; }
main { max-width: 1100px; margin: 0 auto; }
h1 { font-size: 22px; margin: 0 0 4px; font-weight: 600; }
h2 { font-size: 17px; margin: 32px 0 8px; padding-bottom: 4px; border-bottom: 1px solid var(--rule); font-weight: 600; }
h3 { font-size: 14px; margin: 18px 0 4px; font-weight: 600; }
.meta { color: var(--muted); margin: 0 0 12px; }
.meta b { color: var(--ink); font-weight: 600; }
.runs { display: flex; flex-wrap: wrap; gap: 8px 24px; margin: 8px 0 0; padding: 0; list-style: none; }
.chip { display: inline-block; width: 22px; height: 4px; border-radius: 2px; vertical-align: middle; margin-right: 6px; }
.runs .fp { color: var(--muted); font-family: "Liberation Mono", Menlo, Consolas, monospace; font-size: 12px; }
table { border-collapse: collapse; width: 100%; margin: 4px 0 0; font-variant-numeric: tabular-nums; }
th, td { padding: 4px 10px; text-align: left; border-bottom: 1px solid #eef0f2; vertical-align: top; }
thead th { border-bottom: 2px solid var(--rule); font-weight: 600; }
tbody th { font-weight: 600; background: #f6f7f8; color: var(--ink); }
td.label { color: var(--ink); width: 28%; }
td.exp { color: var(--muted); width: 12%; }
td.small { font-size: 12px; color: var(--muted); font-family: "Liberation Mono", Menlo, Consolas, monospace; }
td.warn { color: var(--warn); background: var(--warnbg); font-weight: 600; }
figure { margin: 8px 0 18px; }
figure svg { display: block; width: 100%; height: auto; }
.legend { display: flex; flex-wrap: wrap; gap: 4px 20px; color: var(--muted); font-size: 13px; margin: 4px 0 0; }
.swatch { display: inline-block; width: 22px; height: 10px; vertical-align: middle; margin-right: 6px; }
.note { color: var(--muted); font-size: 12px; }
.caution { font-size: 13px; border-left: 4px solid var(--warn); padding: 4px 10px; margin: 8px 0 0; }
</style>
</head>
<body>
<main>
<header>
<h1>Replay report — {{.Plant}}</h1>
<p class="meta">Recording <b>{{.Source}}</b> · {{.Start}} to {{.End}} ({{.Duration}}) · {{.Ticks}} ticks</p>
<ul class="runs">
{{range .Runs}}<li><span class="chip" style="{{.Line}}"></span><b>{{.Gains}}</b> · {{.Form}} <span class="fp">{{.Fingerprint}}</span></li>
{{end}}</ul>
<p class="caution"><b>Caution.</b> Estimates are a model's inference, not measurements, and a replay shows how gain sets behaved on this recording only. An estimator is not a safety function: interlocks and trips act on measured signals; commissioning follows local codes and licensed engineering practice. A status here is the estimator's judgement of itself, not a process alarm.</p>
</header>

<h2>Summary</h2>
<table>
<thead><tr><th></th><th>expected</th>{{range .Runs}}<th><span class="chip" style="{{.Line}}"></span>{{.Gains}}</th>{{end}}</tr></thead>
{{range .Sections}}<tbody>
<tr><th colspan="{{$.Colspan}}">{{.Title}}</th></tr>
{{range .Rows}}<tr><td class="label">{{.Label}}</td><td class="exp">{{.Expected}}</td>{{$small := .Small}}{{range .Cells}}<td class="{{if .Warn}}warn{{else if $small}}small{{end}}">{{.Text}}</td>{{end}}</tr>
{{end}}</tbody>
{{end}}</table>
<p class="note">Expected values are those of a consistent filter: a NIS inside its two-sided 95 % chi-square band on 95 % of ticks, a mean NIS equal to the mean number of outputs (dof), white innovations (the Ljung–Box test over lags 1–{{.Lags}}: a p-value of at least {{.Level}}; Ljung and Box, Biometrika 65(2), 1978), no sensor fault (a bias from a two-sided CUSUM of the normalised innovation, k = 0.5, h = 10; a stuck value; a gate lock-out){{if .HasTruth}}, and an error within ±2σ on 95 % of ticks{{end}}. Highlighted cells fall short of that.</p>

<h2>Innovations</h2>
<div class="legend">{{range .Runs}}<span><span class="chip" style="{{.Line}}"></span>{{.Gains}}</span>{{end}}<span><span class="chip" style="background:#445"></span>±2√S claimed by each gain set (darker, thicker line)</span>{{if .HasFaults}}<span><span class="chip" style="height:6px;background:#555"></span>bars along the bottom: the set's sensor-fault episodes (see the table)</span>{{end}}{{if .Clipped}}<span>▲ ▼ at an edge: values beyond the view ({{.Clipped}} points), which holds every value lasting more than two ticks and the claimed bands once settled</span>{{end}}</div>
{{range .Innovations}}<figure>{{.SVG}}</figure>
{{end}}
<h2>NIS</h2>
<div class="legend">{{range .Runs}}<span><span class="chip" style="{{.Line}}"></span>{{.Gains}}: thin, the largest NIS of each time bucket; thick, the windowed mean; dashed, its 95 % band</span>{{end}}</div>
<figure>{{.NIS.SVG}}</figure>

<h2>States</h2>
<div class="legend">{{range .Runs}}<span><span class="chip" style="{{.Line}}"></span>{{.Gains}}</span>{{end}}{{if .HasStateStd}}<span><span class="swatch" style="background:#9aa5b1;opacity:.35"></span>±2σ (edges in the set's colour and dash)</span>{{end}}{{if .HasTruth}}<span><span class="chip" style="background:repeating-linear-gradient(90deg,#333 0 6px,transparent 6px 9px)"></span>true state (simulation)</span>{{end}}</div>
{{range .States}}<figure>{{.SVG}}</figure>
{{end}}
<p class="note">Long series are drawn as the minimum and maximum of each of {{.Buckets}} time buckets, so single-tick spikes remain visible. Times are those of the recording.</p>
</main>
</body>
</html>
`
