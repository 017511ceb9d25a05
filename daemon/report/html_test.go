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
