package report

import (
	"bytes"
	"fmt"
	"image/color"
	"math"
	"sort"
	"strings"
	"time"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"
)

// Buckets is the number of time buckets a long series is reduced to for
// plotting: about one per point of the plot's width. Each bucket keeps its
// minimum and maximum, so a one-tick spike still shows.
const Buckets = 700

// Plot size, in points.
const (
	plotWidth  = 720
	plotHeight = 220
)

// palette gives each gain set its colour, in the order of Input.Runs.
func palette(i int) color.NRGBA {
	p := [...]color.NRGBA{
		{0x1f, 0x5f, 0xa8, 0xff}, // blue
		{0xd0, 0x5a, 0x06, 0xff}, // orange
		{0x2a, 0x8a, 0x4a, 0xff}, // green
		{0x7b, 0x32, 0x94, 0xff}, // purple
		{0x8c, 0x6d, 0x1f, 0xff}, // brown
	}
	return p[i%len(p)]
}

func withAlpha(c color.NRGBA, a uint8) color.NRGBA { c.A = a; return c }

// dashes gives each gain set its line pattern, in the order of Input.Runs,
// so that sets stay apart where colours are hard to tell (a grey print, a
// colour-blind reader): solid, dashed, dotted, dash-dot, long dash.
func dashes(i int) []vg.Length {
	p := [...][]vg.Length{
		nil,
		{vg.Points(6), vg.Points(3)},
		{vg.Points(1.5), vg.Points(2)},
		{vg.Points(6), vg.Points(2), vg.Points(1.5), vg.Points(2)},
		{vg.Points(12), vg.Points(4)},
	}
	return p[i%len(p)]
}

// dashCSS is the CSS background of a legend chip that shows dashes(i).
func dashCSS(i int, c string) string {
	switch i % 5 {
	case 1:
		return fmt.Sprintf("repeating-linear-gradient(90deg,%s 0 6px,transparent 6px 9px)", c)
	case 2:
		return fmt.Sprintf("repeating-linear-gradient(90deg,%s 0 2px,transparent 2px 4px)", c)
	case 3:
		return fmt.Sprintf("repeating-linear-gradient(90deg,%s 0 6px,transparent 6px 8px,%s 8px 10px,transparent 10px 12px)", c, c)
	case 4:
		return fmt.Sprintf("repeating-linear-gradient(90deg,%s 0 12px,transparent 12px 16px)", c)
	}
	return c
}

// robustRange returns y limits for a plot of the series vals with the
// bands whose edges are keep. The limits hold every value of vals that
// persists — the range of their running medians over 5 values, so that a
// spike of one or two ticks leaves the view (clipMarks marks it) instead of
// squashing everything else to a line, while a bias or a step stays in
// view — and the 5 % to 95 % quantiles of each edge series (a band that is
// wide only while the filter settles does not set the scale), with a margin
// of 8 %. ok is false when there is nothing to bound, or when the limits
// already hold every value and edge (gonum's own limits are then right).
func robustRange(vals, keep [][]float64) (lo, hi float64, ok bool) {
	lo, hi = math.Inf(1), math.Inf(-1)
	allLo, allHi := math.Inf(1), math.Inf(-1)
	var win [5]float64
	for _, c := range vals {
		n := 0
		for _, v := range c {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				continue
			}
			allLo, allHi = math.Min(allLo, v), math.Max(allHi, v)
			win[n%5] = v
			n++
			if n >= 5 {
				m := median5(win)
				lo, hi = math.Min(lo, m), math.Max(hi, m)
			}
		}
	}
	var e []float64
	for _, c := range keep {
		e = e[:0]
		for _, v := range c {
			if !math.IsNaN(v) && !math.IsInf(v, 0) {
				e = append(e, v)
				allLo, allHi = math.Min(allLo, v), math.Max(allHi, v)
			}
		}
		if len(e) == 0 {
			continue
		}
		sort.Float64s(e)
		lo = math.Min(lo, e[int(0.05*float64(len(e)-1))])
		hi = math.Max(hi, e[int(0.95*float64(len(e)-1))])
	}
	if math.IsInf(lo, 0) || math.IsInf(hi, 0) {
		return 0, 0, false
	}
	pad := 0.08 * (hi - lo)
	if pad == 0 {
		pad = math.Max(math.Abs(hi)*0.1, 1e-9)
	}
	lo, hi = lo-pad, hi+pad
	if lo <= allLo && hi >= allHi {
		return 0, 0, false
	}
	return lo, hi, true
}

// median5 returns the median of five values.
func median5(w [5]float64) float64 {
	s := w
	sort.Float64s(s[:])
	return s[2]
}

// darker returns c at 60 % of its brightness.
func darker(c color.NRGBA) color.NRGBA {
	return color.NRGBA{uint8(int(c.R) * 6 / 10), uint8(int(c.G) * 6 / 10), uint8(int(c.B) * 6 / 10), c.A}
}

// timeAxis converts tick times to numbers on the plots' x axis: time since
// the start of the earliest run, in a unit that suits the span.
type timeAxis struct {
	t0    time.Time
	scale float64 // seconds per unit
	unit  string
	end   float64 // the last tick, in the unit
}

func newTimeAxis(in *Input) timeAxis {
	t0, t1 := in.Runs[0].Ticks.Time[0], in.Runs[0].Ticks.Time[0]
	for _, r := range in.Runs {
		if t := r.Ticks.Time[0]; t.Before(t0) {
			t0 = t
		}
		if t := r.Ticks.Time[r.Ticks.Len()-1]; t.After(t1) {
			t1 = t
		}
	}
	span := t1.Sub(t0).Seconds()
	a := timeAxis{t0: t0, scale: 3600, unit: "h"}
	switch {
	case span <= 600:
		a.scale, a.unit = 1, "s"
	case span <= 10*3600:
		a.scale, a.unit = 60, "min"
	}
	a.end = span / a.scale
	if a.end <= 0 {
		a.end = 1
	}
	return a
}

func (a timeAxis) label() string {
	return fmt.Sprintf("time since %s (%s)", a.t0.Format("2006-01-02 15:04:05 MST"), a.unit)
}

func (a timeAxis) xs(ts []time.Time) []float64 {
	x := make([]float64, len(ts))
	for i, t := range ts {
		x[i] = t.Sub(a.t0).Seconds() / a.scale
	}
	return x
}

// decimator reduces series over one x range to at most two points per
// bucket, and splits them where values are missing for longer than gap.
type decimator struct {
	xmin, width float64 // bucket width in x units
	buckets     int
	gap         float64
	raw         bool // few enough points to plot them all
}

func newDecimator(x []float64, buckets int) decimator {
	xmin, xmax := x[0], x[len(x)-1]
	span := xmax - xmin
	if span <= 0 {
		span = 1
	}
	d := decimator{xmin: xmin, width: span / float64(buckets), buckets: buckets}
	step := span / float64(max(len(x)-1, 1))
	d.gap = math.Max(2*d.width, 10*step)
	d.raw = len(x) <= 2*buckets
	if d.raw {
		d.gap = 10 * step
	}
	return d
}

func (d decimator) bucket(x float64) int {
	b := int((x - d.xmin) / d.width)
	return min(max(b, 0), d.buckets-1)
}

// lines returns the points of y against x as line segments: in each bucket
// its minimum and maximum, in time order; NaNs are skipped, and a segment
// ends where the values stop for longer than the gap.
func (d decimator) lines(x, y []float64) []plotter.XYs {
	var segs []plotter.XYs
	var cur plotter.XYs
	lastX := math.NaN()
	b := -1
	var lo, hi plotter.XY
	flush := func() {
		if b < 0 {
			return
		}
		if lo == hi {
			cur = append(cur, lo)
		} else if lo.X <= hi.X {
			cur = append(cur, lo, hi)
		} else {
			cur = append(cur, hi, lo)
		}
		b = -1
	}
	endSeg := func() {
		flush()
		if len(cur) > 0 {
			segs = append(segs, cur)
			cur = nil
		}
	}
	for i, v := range y {
		if math.IsNaN(v) {
			continue
		}
		xi := x[i]
		if !math.IsNaN(lastX) && xi-lastX > d.gap {
			endSeg()
		}
		lastX = xi
		p := plotter.XY{X: xi, Y: v}
		if d.raw {
			cur = append(cur, p)
			continue
		}
		if nb := d.bucket(xi); nb != b {
			flush()
			b, lo, hi = nb, p, p
		} else if v < lo.Y {
			lo = p
		} else if v > hi.Y {
			hi = p
		}
	}
	endSeg()
	return segs
}

// upper returns the largest value of y in each bucket, as line segments:
// the envelope that keeps every spike without the clutter of the minima.
func (d decimator) upper(x, y []float64) []plotter.XYs {
	var segs []plotter.XYs
	var cur plotter.XYs
	lastX := math.NaN()
	b := -1
	var hi plotter.XY
	flush := func() {
		if b >= 0 {
			cur = append(cur, hi)
			b = -1
		}
	}
	for i, v := range y {
		if math.IsNaN(v) {
			continue
		}
		xi := x[i]
		if !math.IsNaN(lastX) && xi-lastX > d.gap {
			flush()
			if len(cur) > 0 {
				segs = append(segs, cur)
				cur = nil
			}
		}
		lastX = xi
		p := plotter.XY{X: xi, Y: v}
		nb := i
		if !d.raw {
			nb = d.bucket(xi)
		}
		if nb != b {
			flush()
			b, hi = nb, p
		} else if v > hi.Y {
			hi = p
		}
	}
	flush()
	if len(cur) > 0 {
		segs = append(segs, cur)
	}
	return segs
}

// edges returns the upper and lower edges of the band polygons as lines.
func edges(polys []plotter.XYs) []plotter.XYs {
	out := make([]plotter.XYs, 0, 2*len(polys))
	for _, p := range polys {
		n := len(p) / 2
		out = append(out, p[:n], p[n:])
	}
	return out
}

// band returns polygons enclosing center ± k·std (a nil center is zero):
// in each bucket the largest upper and smallest lower value, at the
// bucket's mean time.
func (d decimator) band(x, center, std []float64, k float64) []plotter.XYs {
	var polys []plotter.XYs
	var up, down plotter.XYs
	lastX := math.NaN()
	b := -1
	var sx, hiV, loV float64
	var cnt int
	flush := func() {
		if b < 0 {
			return
		}
		mx := sx / float64(cnt)
		up = append(up, plotter.XY{X: mx, Y: hiV})
		down = append(down, plotter.XY{X: mx, Y: loV})
		b = -1
	}
	endPoly := func() {
		flush()
		if len(up) > 1 {
			poly := make(plotter.XYs, 0, 2*len(up))
			poly = append(poly, up...)
			for i := len(down) - 1; i >= 0; i-- {
				poly = append(poly, down[i])
			}
			polys = append(polys, poly)
		}
		up, down = nil, nil
	}
	for i, s := range std {
		c := 0.0
		if center != nil {
			c = center[i]
		}
		if math.IsNaN(c) || math.IsNaN(s) {
			continue
		}
		xi := x[i]
		if !math.IsNaN(lastX) && xi-lastX > d.gap {
			endPoly()
		}
		lastX = xi
		h, l := c+k*s, c-k*s
		nb := -2
		if !d.raw {
			nb = d.bucket(xi)
		}
		if nb != b || d.raw {
			flush()
			b, sx, cnt, hiV, loV = max(nb, 0), xi, 1, h, l
			continue
		}
		sx += xi
		cnt++
		hiV = math.Max(hiV, h)
		loV = math.Min(loV, l)
	}
	endPoly()
	return polys
}

// figure is one plot being built.
type figure struct {
	p          *plot.Plot
	points     int     // points drawn by lines
	ymin, ymax float64 // their range
}

func sansFont(size vg.Length) font.Font {
	f := font.From(plot.DefaultFont, size)
	f.Variant = "Sans"
	return f
}

func newFigure(title, xlabel, ylabel string) *figure {
	p := plot.New()
	p.Title.Text = title
	p.Title.TextStyle.Font = sansFont(11)
	p.Title.Padding = vg.Points(4)
	p.X.Label.Text = xlabel
	p.Y.Label.Text = ylabel
	for _, a := range []*plot.Axis{&p.X, &p.Y} {
		a.Label.TextStyle.Font = sansFont(9)
		a.Tick.Label.Font = sansFont(8)
		a.Color = color.Gray{0x55}
		a.Tick.Color = color.Gray{0x55}
		a.Tick.Label.Color = color.Gray{0x33}
	}
	g := plotter.NewGrid()
	g.Vertical.Color = color.Gray{0xe4}
	g.Horizontal.Color = color.Gray{0xe4}
	g.Vertical.Width = vg.Points(0.5)
	g.Horizontal.Width = vg.Points(0.5)
	p.Add(g)
	return &figure{p: p}
}

func (f *figure) lines(segs []plotter.XYs, c color.Color, width float64, dashes ...vg.Length) {
	for _, s := range segs {
		l, err := plotter.NewLine(s)
		if err != nil {
			continue // only non-finite values fail, and none get here
		}
		l.LineStyle.Color = c
		l.LineStyle.Width = vg.Points(width)
		l.LineStyle.Dashes = dashes
		f.p.Add(l)
		if f.points == 0 {
			f.ymin, f.ymax = s[0].Y, s[0].Y
		}
		f.points += len(s)
		for _, p := range s {
			f.ymin, f.ymax = math.Min(f.ymin, p.Y), math.Max(f.ymax, p.Y)
		}
	}
}

// clipMarks marks, at the edge of the view [lo, hi], every point of segs
// beyond it: a triangle pointing the way the value went, in the run's
// colour. It returns how many points it marked.
func (f *figure) clipMarks(segs []plotter.XYs, lo, hi float64, c color.Color) int {
	var up, down plotter.XYs
	for _, s := range segs {
		for _, p := range s {
			switch {
			case p.Y > hi:
				up = append(up, plotter.XY{X: p.X, Y: hi})
			case p.Y < lo:
				down = append(down, plotter.XY{X: p.X, Y: lo})
			}
		}
	}
	for _, m := range []struct {
		pts   plotter.XYs
		shape draw.GlyphDrawer
	}{{up, draw.PyramidGlyph{}}, {down, invertedPyramid{}}} {
		if len(m.pts) == 0 {
			continue
		}
		sc, err := plotter.NewScatter(m.pts)
		if err != nil {
			continue
		}
		sc.GlyphStyle.Shape = m.shape
		sc.GlyphStyle.Color = c
		sc.GlyphStyle.Radius = vg.Points(3)
		f.p.Add(sc)
	}
	return len(up) + len(down)
}

// invertedPyramid is a filled triangle pointing down.
type invertedPyramid struct{}

// DrawGlyph implements draw.GlyphDrawer.
func (invertedPyramid) DrawGlyph(c *draw.Canvas, sty draw.GlyphStyle, pt vg.Point) {
	c.SetColor(sty.Color)
	r := sty.Radius
	var p vg.Path
	p.Move(vg.Point{X: pt.X, Y: pt.Y - r})
	p.Line(vg.Point{X: pt.X - r*vg.Length(math.Cos(math.Pi/6)), Y: pt.Y + r*vg.Length(math.Sin(math.Pi/6))})
	p.Line(vg.Point{X: pt.X + r*vg.Length(math.Cos(math.Pi/6)), Y: pt.Y + r*vg.Length(math.Sin(math.Pi/6))})
	p.Close()
	c.Fill(p)
}

// spans draws one thick horizontal bar per interval [x0, x1] at height y,
// for fault episodes along the bottom of a plot.
func (f *figure) spans(xs [][2]float64, y float64, c color.Color) {
	for _, x := range xs {
		l, err := plotter.NewLine(plotter.XYs{{X: x[0], Y: y}, {X: x[1], Y: y}})
		if err != nil {
			continue
		}
		l.LineStyle.Color = c
		l.LineStyle.Width = vg.Points(4)
		f.p.Add(l)
	}
}

func (f *figure) bands(polys []plotter.XYs, c color.Color) {
	for _, s := range polys {
		pg, err := plotter.NewPolygon(s)
		if err != nil {
			continue
		}
		pg.Color = c
		pg.LineStyle.Width = 0
		f.p.Add(pg)
	}
}

// svg renders the figure and returns an <svg> element for inline use in
// HTML: no XML prolog, no namespace URLs (the HTML parser puts <svg> in
// the SVG namespace), a viewBox and no fixed size, so CSS sets the width,
// and a font stack that falls back from the Liberation fonts the layout
// was measured with to their metric equivalents.
func (f *figure) svg() (string, error) {
	c := vgsvg.New(vg.Points(plotWidth), vg.Points(plotHeight))
	f.p.Draw(draw.New(c))
	var b bytes.Buffer
	if _, err := c.WriteTo(&b); err != nil {
		return "", fmt.Errorf("report: rendering a plot: %w", err)
	}
	s := b.String()
	i := strings.Index(s, "<svg ")
	j := strings.IndexByte(s[max(i, 0):], '>')
	if i < 0 || j < 0 {
		return "", fmt.Errorf("report: the SVG renderer wrote no <svg> element")
	}
	open := fmt.Sprintf(`<svg viewBox="0 0 %d %d" role="img" aria-label="%s">`, plotWidth, plotHeight, htmlAttr(f.p.Title.Text))
	s = open + s[i+j+1:]
	s = strings.ReplaceAll(s, "font-family:Liberation Sans;", "font-family:'Liberation Sans',Arial,Helvetica,sans-serif;")
	return s, nil
}

func htmlAttr(s string) string {
	r := strings.NewReplacer(`&`, "&amp;", `"`, "&#34;", `<`, "&lt;", `>`, "&gt;")
	return r.Replace(s)
}
