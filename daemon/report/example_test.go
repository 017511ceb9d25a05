package report_test

import (
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"
	"time"

	"surmise/daemon/report"
)

// Example builds a report the way the replay driver does: one TickRow per
// tick, appended to the run's columns, then the summary and the page.
func Example() {
	in := &report.Input{
		Plant:       "hot-water loop",
		Source:      "run.csv",
		StateNames:  []string{"T_tank"},
		StateUnits:  []string{"°C"},
		OutputNames: []string{"T_probe"},
		OutputUnits: []string{"°C"},
	}
	ticks := report.NewTicks(1, 1, 4)
	t0 := time.Date(2024, 5, 6, 6, 0, 0, 0, time.UTC)
	row := report.TickRow{
		States: make([]float64, 1), StateStd: make([]float64, 1),
		Innovations: make([]float64, 1), InnovationStd: make([]float64, 1),
		NISMean: math.NaN(), BandLo: math.NaN(), BandHi: math.NaN(),
	}
	for k, r := range []float64{0.2, math.NaN(), -0.1, 0.3} {
		row.Time = t0.Add(time.Duration(k) * 100 * time.Millisecond)
		row.States[0], row.StateStd[0] = 61+r/2, 0.1
		row.Innovations[0], row.InnovationStd[0] = r, 0.2
		row.Status, row.NIS, row.Dof = "tracking", r*r/0.04, 1
		if math.IsNaN(r) {
			row.Status, row.Dof = "coasting", 0
		}
		ticks.Append(&row)
	}
	in.Runs = []report.Run{{Gains: "default", Form: "kalman", Ticks: ticks}}

	s := report.Summarise(in)[0]
	// Innovations 0.2, −0.1, 0.3 with S = 0.04: NIS 1, 0.25, 2.25.
	fmt.Printf("%d ticks, %d coasting, mean NIS %.4f over %d ticks, innovation RMS %.4f °C\n",
		s.Ticks, s.Coasting, s.MeanNIS, s.NISTicks, s.Outputs[0].RMS)

	path := filepath.Join(os.TempDir(), "surmise-example-report.html")
	f, err := os.Create(path)
	if err != nil {
		fmt.Println(err)
		return
	}
	defer os.Remove(path)
	if err := report.WriteHTML(f, in); err != nil {
		fmt.Println(err)
	}
	f.Close()
	page, _ := os.ReadFile(path)
	fmt.Println("plots:", strings.Count(string(page), "<svg "))
	// Output:
	// 4 ticks, 1 coasting, mean NIS 1.1667 over 3 ticks, innovation RMS 0.2160 °C
	// plots: 3
}
