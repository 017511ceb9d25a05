package report

import (
	"bytes"
	"encoding/xml"
	"io"
	"math"
	"strings"
	"testing"
)

func TestWriteHTML(t *testing.T) {
	in := simulate(20_000, 3)
	in.Plant = `loop <b>&</b> "tank"` // must come out escaped
	var buf bytes.Buffer
	if err := WriteHTML(&buf, in); err != nil {
		t.Fatal(err)
	}
	page := buf.String()
	if !strings.HasPrefix(page, "<!DOCTYPE html>") || !strings.HasSuffix(strings.TrimSpace(page), "</html>") {
		t.Error("not a whole HTML document")
	}
	// One plot per output, one for the NIS, one per state.
	wantPlots := len(in.OutputNames) + 1 + len(in.StateNames)
	if got := strings.Count(page, "<svg "); got != wantPlots {
		t.Errorf("%d <svg> elements, want %d", got, wantPlots)
	}
	if got := strings.Count(page, "</svg>"); got != wantPlots {
		t.Errorf("%d </svg>, want %d", got, wantPlots)
	}
	// Self-contained: nothing to fetch, nothing to run.
	for _, bad := range []string{"http://", "https://", "<script", "<link", "@import", "url(", "<img", "<?xml"} {
		if strings.Contains(page, bad) {
			t.Errorf("the page contains %q", bad)
		}
	}
	if strings.Contains(page, "<b>&</b>") || !strings.Contains(page, "loop &lt;b&gt;&amp;&lt;/b&gt; &#34;tank&#34;") {
		t.Error("the plant name is not escaped")
	}
	// The summary numbers are in the table, as Summarise computes them.
	for _, s := range Summarise(in) {
		for _, want := range []string{
			">" + s.Gains + "<",
			num(s.MeanNIS) + " (dof " + num(s.MeanDof) + ")",
			pct(s.NISInBand),
			pct(s.WindowsInBand),
			count(s.Coasting, s.Ticks),
			num(s.Outputs[0].RMS),
		} {
			if !strings.Contains(page, want) {
				t.Errorf("run %s: the page lacks %q", s.Gains, want)
			}
		}
	}
	// Units on the axes.
	for _, want := range []string{"not a safety function", "not a process alarm", "innovation (°C)", "T_tank (°C)", "offset (K)", "time since 2024-05-06 06:00:00 UTC (min)"} {
		if !strings.Contains(page, want) {
			t.Errorf("no axis label %q", want)
		}
	}
	// Well formed: every element closes (the page is XHTML-compatible
	// apart from HTML's void elements and entities).
	dec := xml.NewDecoder(strings.NewReader(page))
	dec.Strict = false
	dec.AutoClose = xml.HTMLAutoClose
	dec.Entity = xml.HTMLEntity
	depth, elements := 0, 0
	for {
		tok, err := dec.Token()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatalf("the page does not parse: %v", err)
		}
		switch tok.(type) {
		case xml.StartElement:
			depth++
			elements++
		case xml.EndElement:
			depth--
		}
	}
	if depth != 0 || elements < 100 {
		t.Errorf("unbalanced page: depth %d after %d elements", depth, elements)
	}
}

func TestWriteHTMLWithoutOptionalColumns(t *testing.T) {
	in := simulate(3_000, 5)
	in.Truth = nil
	in.StateUnits, in.OutputUnits = nil, nil
	in.Runs = in.Runs[:1]
	tk := &in.Runs[0].Ticks
	tk.StateStd, tk.InnovationStd, tk.NISMean, tk.BandLo, tk.BandHi = nil, nil, nil, nil, nil
	var buf bytes.Buffer
	if err := WriteHTML(&buf, in); err != nil {
		t.Fatal(err)
	}
	page := buf.String()
	if strings.Contains(page, "true state") || strings.Contains(page, "±2σ") {
		t.Error("legend names curves that are not drawn")
	}
	if !strings.Contains(page, "time since 2024-05-06 06:00:00 UTC (s)") {
		t.Error("a five-minute run should have its time axis in seconds")
	}
}

func TestWriteHTMLRefusesInvalidInput(t *testing.T) {
	in := simulate(100, 1)
	in.Runs[1].Ticks.NIS = in.Runs[1].Ticks.NIS[:10]
	if err := WriteHTML(io.Discard, in); err == nil || !strings.Contains(err.Error(), "sluggish") {
		t.Errorf("error %v, want one naming the run", err)
	}
}

func TestWriteHTMLNonFiniteAndConstantSeries(t *testing.T) {
	// A run where nothing was measured: every innovation and NIS NaN, the
	// states constant. The report must still render.
	in := oneRun(500, 2)
	tk := &in.Runs[0].Ticks
	for k := range tk.Status {
		tk.Status[k] = "coasting"
		tk.NIS[k] = math.NaN()
	}
	var buf bytes.Buffer
	if err := WriteHTML(&buf, in); err != nil {
		t.Fatal(err)
	}
	if strings.Count(buf.String(), "<svg ") != 4 {
		t.Error("plots missing")
	}
	// One NIS in the whole run, of 0.5: a log axis around a single value.
	tk.NIS[100], tk.Dof[100] = 0.5, 1
	buf.Reset()
	if err := WriteHTML(&buf, in); err != nil {
		t.Fatal(err)
	}
}

// TestWriteHTMLComparesWhatMatters checks the report's layout: with the
// truth, the error RMS and 2σ coverage per state come first; each set has
// its own dash; whiteness is the Ljung–Box test; fault episodes are listed
// and drawn; a spike leaves the view with a mark instead of setting it.
func TestWriteHTMLComparesWhatMatters(t *testing.T) {
	in := simulate(3_000, 5)
	// A bias flagged on the probe by the second set from tick 1000 to 1200.
	for k := 1000; k <= 1200; k++ {
		in.Runs[1].Ticks.Faults[0][k] = FaultBiasHigh
	}
	// A lone 40 °C spike on the probe's innovation, far beyond the rest.
	in.Runs[0].Ticks.Innovations[0][2000] = 40
	var buf bytes.Buffer
	if err := WriteHTML(&buf, in); err != nil {
		t.Fatal(err)
	}
	page := buf.String()
	truth, ticks := strings.Index(page, "Against the true states"), strings.Index(page, ">Ticks<")
	if truth < 0 || ticks < 0 || truth > ticks {
		t.Errorf("the comparison with the true states is not first (at %d, ticks at %d)", truth, ticks)
	}
	sums := Summarise(in)
	for _, s := range sums {
		for _, st := range s.States {
			if want := num(st.RMS) + " · " + pct(st.Coverage); !strings.Contains(page, want) {
				t.Errorf("%s: the page lacks %q for %s", s.Gains, want, st.Name)
			}
		}
	}
	if !strings.Contains(page, "Ljung–Box Q over lags 1–10") || strings.Contains(page, "outside ±1.96/√N") {
		t.Error("whiteness is not the Ljung–Box test")
	}
	if !strings.Contains(page, "bias, reads high 1m40s–2m0s") || !strings.Contains(page, "bars along the bottom") {
		t.Errorf("the fault episode is not listed and drawn: %v", sums[1].Outputs[0].Faults)
	}
	if !strings.Contains(page, "repeating-linear-gradient(90deg,#d05a06 0 6px") {
		t.Error("the second set's legend chip is not dashed")
	}
	if !strings.Contains(page, "values beyond the view") {
		t.Error("the spike did not leave the view with a mark")
	}
	if strings.Contains(page, ">40<") {
		t.Error("the spike set the y axis")
	}
}

func TestRobustRange(t *testing.T) {
	// A noise of ±1 with two lone spikes of 50 and a step to 5 lasting ten
	// values: the spikes leave the view, the step stays, the band edges at
	// ±3 stay.
	v := make([]float64, 200)
	for i := range v {
		v[i] = math.Sin(float64(i))
	}
	v[50], v[120] = 50, -50
	for i := 150; i < 160; i++ {
		v[i] = 5
	}
	edges := make([]float64, 200)
	for i := range edges {
		edges[i] = -3
	}
	lo, hi, ok := robustRange([][]float64{v}, [][]float64{edges})
	if !ok || !(hi > 5 && hi < 6) || !(lo < -3 && lo > -4) {
		t.Errorf("robustRange = %v, %v, %v; want about −3.6, 5.6, true", lo, hi, ok)
	}
	ramp := make([]float64, 40)
	for i := range ramp {
		ramp[i] = float64(i)
	}
	if _, _, ok := robustRange([][]float64{ramp}, nil); ok {
		t.Error("a series without spikes needs no limits of its own")
	}
}
