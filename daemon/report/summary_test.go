package report

import (
	"encoding/json"
	"math"
	"math/rand/v2"
	"os"
	"testing"
	"time"

	"gonum.org/v1/gonum/stat/distuv"

	"surmise/estimator"
)

// reference is testdata/reference.json, computed by testdata/reference.py
// with numpy 1.24 and scipy 1.10 from Debian (testdata/reference/SOURCES.md:
// nis-band, mehra-whiteness).
type reference struct {
	Chi2TwoSided95 map[string][2]float64 `json:"chi2_two_sided_95"`
	Binomial3of10  float64               `json:"binomial_3_of_10_at_0_05"`
	White          refSeries             `json:"white"`
	AR1            refSeries             `json:"ar1"`
	NIS            struct {
		Values  []*float64 `json:"values"`
		Dof     []int      `json:"dof"`
		Ticks   int        `json:"ticks"`
		Mean    float64    `json:"mean"`
		MeanDof float64    `json:"mean_dof"`
		InBand  float64    `json:"in_band"`
	} `json:"nis"`
}

type refSeries struct {
	Values   []*float64 `json:"values"`
	N        int        `json:"n"`
	Mean     float64    `json:"mean"`
	RMS      float64    `json:"rms"`
	Autocorr []float64  `json:"autocorr"`
	Bound    float64    `json:"bound"`
	Outside  int        `json:"outside"`
}

func loadReference(t *testing.T) *reference {
	t.Helper()
	b, err := os.ReadFile("testdata/reference.json")
	if err != nil {
		t.Fatal(err)
	}
	var r reference
	if err := json.Unmarshal(b, &r); err != nil {
		t.Fatal(err)
	}
	return &r
}

// floats turns JSON nulls into NaN and pads with NaN to n values.
func floats(v []*float64, n int) []float64 {
	out := make([]float64, n)
	for i := range out {
		out[i] = math.NaN()
		if i < len(v) && v[i] != nil {
			out[i] = *v[i]
		}
	}
	return out
}

func near(got, want, rel float64) bool {
	return math.Abs(got-want) <= rel*math.Max(1, math.Abs(want))
}

// oneRun builds an Input with one run of n ticks, 10 Hz, every column
// present; the caller fills the columns it tests.
func oneRun(n, outputs int) *Input {
	in := &Input{Plant: "p", Source: "s", StateNames: []string{"x"}}
	for j := 0; j < outputs; j++ {
		in.OutputNames = append(in.OutputNames, string(rune('a'+j)))
	}
	t := NewTicks(1, outputs, n)
	row := TickRow{States: []float64{0}, Innovations: make([]float64, outputs), Status: "tracking",
		NIS: math.NaN(), NISMean: math.NaN(), BandLo: math.NaN(), BandHi: math.NaN()}
	t0 := time.Date(2024, 5, 6, 0, 0, 0, 0, time.UTC)
	for k := 0; k < n; k++ {
		row.Time = t0.Add(time.Duration(k) * 100 * time.Millisecond)
		for j := range row.Innovations {
			row.Innovations[j] = math.NaN()
		}
		t.Append(&row)
	}
	in.Runs = []Run{{Gains: "g", Form: "kalman", Ticks: t}}
	return in
}

func TestSummariseAgainstNumpy(t *testing.T) {
	ref := loadReference(t)
	n := max(len(ref.White.Values), len(ref.AR1.Values), len(ref.NIS.Values))
	in := oneRun(n, 2)
	tk := &in.Runs[0].Ticks
	tk.Innovations[0] = floats(ref.White.Values, n)
	tk.Innovations[1] = floats(ref.AR1.Values, n)
	tk.NIS = floats(ref.NIS.Values, n)
	for k := range tk.Dof {
		tk.Dof[k] = 0
		if k < len(ref.NIS.Dof) {
			tk.Dof[k] = ref.NIS.Dof[k]
		}
	}
	s := Summarise(in)[0]

	for j, want := range []refSeries{ref.White, ref.AR1} {
		o := s.Outputs[j]
		if o.N != want.N || !near(o.Mean, want.Mean, 1e-12) || !near(o.RMS, want.RMS, 1e-12) || !near(o.Bound, want.Bound, 1e-12) {
			t.Errorf("output %d: N %d mean %g RMS %g bound %g; numpy %d %g %g %g", j, o.N, o.Mean, o.RMS, o.Bound,
				want.N, want.Mean, want.RMS, want.Bound)
		}
		for lag := range want.Autocorr {
			if !near(o.Autocorr[lag], want.Autocorr[lag], 1e-10) {
				t.Errorf("output %d lag %d: ρ = %.15g, numpy %.15g", j, lag+1, o.Autocorr[lag], want.Autocorr[lag])
			}
		}
		// Ljung–Box on the same autocorrelations (the statistic and its
		// scipy p-value are checked in estimator).
		if q, p := estimator.LjungBox(o.Autocorr, o.N); q != o.LjungBox || p != o.P {
			t.Errorf("output %d: Ljung–Box %v, %v; estimator.LjungBox %v, %v", j, o.LjungBox, o.P, q, p)
		}
	}
	// The white sequence passes, the AR(1) sequence (coefficient 0.6) fails.
	if !s.Outputs[0].White || s.Outputs[1].White {
		t.Errorf("White = %v, %v; want true, false", s.Outputs[0].White, s.Outputs[1].White)
	}
	if s.NISTicks != ref.NIS.Ticks || !near(s.MeanNIS, ref.NIS.Mean, 1e-12) ||
		!near(s.MeanDof, ref.NIS.MeanDof, 1e-12) || !near(s.NISInBand, ref.NIS.InBand, 1e-12) {
		t.Errorf("NIS: %d ticks, mean %g, dof %g, in band %g; numpy %d, %g, %g, %g", s.NISTicks, s.MeanNIS, s.MeanDof,
			s.NISInBand, ref.NIS.Ticks, ref.NIS.Mean, ref.NIS.MeanDof, ref.NIS.InBand)
	}
}

func TestNISBandsAgainstScipy(t *testing.T) {
	ref := loadReference(t)
	b := newNISBands()
	for dof := 1; dof <= 4; dof++ {
		want := ref.Chi2TwoSided95[string(rune('0'+dof))]
		lo, hi := b.band(dof)
		if !near(lo, want[0], 1e-9) || !near(hi, want[1], 1e-9) {
			t.Errorf("dof %d: band [%.12g, %.12g], scipy chi2.ppf [%.12g, %.12g]", dof, lo, hi, want[0], want[1])
		}
	}
}

func TestAutocorrelationClosedForm(t *testing.T) {
	// An alternating ±1 sequence of even length has mean 0 and
	// ρ(j) = (−1)^j·(N−j)/N exactly (closed form).
	const n = 1000
	r := make([]float64, n)
	for i := range r {
		r[i] = 1 - 2*float64(i%2)
	}
	rho := Autocorrelation(make([]float64, Lags), r)
	for j, got := range rho {
		lag := j + 1
		want := float64(n-lag) / n
		if lag%2 == 1 {
			want = -want
		}
		if math.Abs(got-want) > 1e-15 {
			t.Errorf("ρ(%d) = %.17g, want %.17g", lag, got, want)
		}
	}
	// NaNs are left out: the same sequence with a NaN between every value
	// (a sensor at half the tick rate) has the same autocorrelation.
	sparse := make([]float64, 2*n)
	for i := range sparse {
		sparse[i] = math.NaN()
		if i%2 == 0 {
			sparse[i] = r[i/2]
		}
	}
	rho2 := Autocorrelation(make([]float64, Lags), sparse)
	for j := range rho {
		if rho2[j] != rho[j] {
			t.Errorf("lag %d: %g with gaps, %g without", j+1, rho2[j], rho[j])
		}
	}
}

// TestSummariseSeededDraws checks the statistics against their sampling
// distributions: draws of a consistent filter land where chi-square and
// Mehra's bound say (SOURCES.md: chi2-table, mehra-whiteness), an
// overconfident one does not.
func TestSummariseSeededDraws(t *testing.T) {
	const n = 40_000
	src := rand.New(rand.NewPCG(7, 11))
	in := oneRun(n, 1)
	tk := &in.Runs[0].Ticks
	for k := 0; k < n; k++ {
		tk.Innovations[0][k] = 0.5 * src.NormFloat64()
		tk.Dof[k] = 2
	}
	chi := distuv.ChiSquared{K: 2, Src: src}
	for k := range tk.NIS {
		tk.NIS[k] = chi.Rand()
	}
	s := Summarise(in)[0]
	// The fraction inside a 95 % band is binomial: standard error
	// √(0.95·0.05/n) ≈ 0.0011; allow four of them.
	if math.Abs(s.NISInBand-0.95) > 4*math.Sqrt(0.95*0.05/n) {
		t.Errorf("consistent draws: %.4f inside the band, want 0.95 ± 0.0044", s.NISInBand)
	}
	// The mean of n χ²(2) draws: 2 ± 4·√(2·2/n) (variance of χ²(k) is 2k).
	if math.Abs(s.MeanNIS-2) > 4*math.Sqrt(4.0/n) {
		t.Errorf("mean NIS %.4f, want 2 ± 0.04", s.MeanNIS)
	}
	if o := s.Outputs[0]; !o.White || math.Abs(o.RMS-0.5) > 0.01 {
		t.Errorf("white normal draws: White %v (p %.3g), RMS %.4f (want 0.5)", o.White, o.P, o.RMS)
	}
	// Overconfident by a factor of 2 in variance: NIS doubles, and with it
	// the mass above the upper quantile: P(χ²(2) > 7.3778/2) = e^(−1.8444)
	// = 0.158 (χ²(2) is exponential with mean 2; closed form), while the
	// lower tail holds P(χ²(2) < 0.0506/2) = 0.0126.
	for k := range tk.NIS {
		tk.NIS[k] *= 2
	}
	s = Summarise(in)[0]
	want := 1 - (0.158 + 0.0126)
	if math.Abs(s.NISInBand-want) > 0.01 {
		t.Errorf("overconfident draws: %.4f inside the band, want about %.3f", s.NISInBand, want)
	}
}

func TestSummariseCounts(t *testing.T) {
	in := oneRun(8, 1)
	tk := &in.Runs[0].Ticks
	copy(tk.Status, []string{"tracking", "tracking", "coasting", "stale-input", "suspect", "suspect", "suspect", "warming-up"})
	copy(tk.Outliers, []int{0, 1, 0, 0, 2, 0, 0, 0})
	// Windowed means: NaN (no window yet), inside, on the edges (inside),
	// below, above.
	copy(tk.NISMean, []float64{math.NaN(), 1, 0.5, 2, 0.4, 2.1, 1, 1})
	copy(tk.BandLo, []float64{math.NaN(), 0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5})
	copy(tk.BandHi, []float64{math.NaN(), 2, 2, 2, 2, 2, 2, 2})
	copy(tk.Innovations[0], []float64{3, math.NaN(), -4, math.NaN(), math.NaN(), math.NaN(), math.NaN(), math.NaN()})
	s := Summarise(in)[0]
	if s.Ticks != 8 || s.Tracking != 2 || s.Coasting != 1 || s.StaleInput != 1 || s.Suspect != 3 || s.Other != 1 || s.Outliers != 3 {
		t.Errorf("counts %+v", s)
	}
	if s.Windows != 7 || s.WindowsInBand != 5.0/7 {
		t.Errorf("windows %d, in band %g; want 7 and 5/7", s.Windows, s.WindowsInBand)
	}
	// Innovations 3 and −4: mean −0.5, RMS √(25/2) (closed form); too few
	// values for the whiteness test.
	o := s.Outputs[0]
	if o.N != 2 || o.Mean != -0.5 || math.Abs(o.RMS-math.Sqrt(12.5)) > 1e-15 || o.Autocorr != nil || o.White {
		t.Errorf("output %+v", o)
	}
	if !math.IsNaN(s.MeanNIS) || s.NISTicks != 0 {
		t.Errorf("no NIS given, got %d ticks, mean %g", s.NISTicks, s.MeanNIS)
	}
	if !s.Start.Equal(tk.Time[0]) || !s.End.Equal(tk.Time[7]) {
		t.Errorf("span %v – %v", s.Start, s.End)
	}
}

func TestValidate(t *testing.T) {
	tests := []struct {
		name  string
		spoil func(in *Input)
	}{
		{"no runs", func(in *Input) { in.Runs = nil }},
		{"short NIS", func(in *Input) { in.Runs[0].Ticks.NIS = in.Runs[0].Ticks.NIS[:3] }},
		{"missing output column", func(in *Input) { in.Runs[0].Ticks.Innovations = nil }},
		{"short state column", func(in *Input) { in.Runs[0].Ticks.States[0] = in.Runs[0].Ticks.States[0][:1] }},
		{"units", func(in *Input) { in.StateUnits = []string{"a", "b"} }},
		{"truth of another length", func(in *Input) { in.Truth = [][]float64{{1}} }},
		{"band without mean", func(in *Input) { in.Runs[0].Ticks.NISMean = nil }},
		{"time goes back", func(in *Input) { in.Runs[0].Ticks.Time[2] = in.Runs[0].Ticks.Time[0].Add(-time.Second) }},
		{"no ticks", func(in *Input) { in.Runs[0].Ticks = NewTicks(1, 1, 0) }},
	}
	if err := oneRun(5, 1).Validate(); err != nil {
		t.Fatalf("a valid input: %v", err)
	}
	for _, tc := range tests {
		in := oneRun(5, 1)
		tc.spoil(in)
		if err := in.Validate(); err == nil {
			t.Errorf("%s: Validate did not fail", tc.name)
		}
	}
	// Optional columns may be left out together.
	in := oneRun(5, 1)
	tk := &in.Runs[0].Ticks
	tk.StateStd, tk.InnovationStd, tk.NISMean, tk.BandLo, tk.BandHi = nil, nil, nil, nil, nil
	if err := in.Validate(); err != nil {
		t.Errorf("without optional columns: %v", err)
	}
}

func TestTicksAppendAllocatesNothing(t *testing.T) {
	tk := NewTicks(3, 2, 1000)
	row := TickRow{Time: time.Unix(0, 0), Status: "tracking", States: make([]float64, 3), StateStd: make([]float64, 3),
		Innovations: make([]float64, 2), InnovationStd: make([]float64, 2)}
	allocs := testing.AllocsPerRun(500, func() { tk.Append(&row) })
	if allocs != 0 {
		t.Errorf("Append allocates %.1f times per tick within capacity, want 0", allocs)
	}
	defer func() {
		if recover() == nil {
			t.Error("appending a row of the wrong shape did not panic")
		}
	}()
	tk.Append(&TickRow{States: make([]float64, 2), Innovations: make([]float64, 2)})
}
