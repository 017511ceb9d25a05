package estimator

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"
)

func TestOutlierGate(t *testing.T) {
	// A consistent filter's NIS over all p outputs is χ²(p), so the gate
	// at probability g rejects a tick's worst output with probability 1 − g
	// (SOURCES.md: chi2-table); a 20σ spike is rejected.
	md := threeModel()
	prior, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	sets := []*GainSet{
		{Name: "current", Form: Current, Gains: []PatternGain{
			{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)},
			{Outputs: 1, L: mat.NewDense(3, 1, []float64{0.5, 0.05, 0}), S: mat.NewSymDense(1, []float64{s.At(0, 0)})},
		}},
		{Name: "kalman", Form: Kalman},
	}
	for _, g := range sets {
		t.Run(g.Name, func(t *testing.T) {
			const gate, ticks = 0.99, 20000
			pr := mustPrepare(t, md, g, gate)
			pl := NewPlant(md, 5, nil)
			f := NewFilter(pr, nil, symOf(prior))
			u, y := []float64{10}, make([]float64, 2)
			rejected := 0
			for k := 0; k < ticks; k++ {
				pl.Step(u)
				pl.OutputTo(y)
				out := f.Step(u, y, 3)
				if out.Outliers != 0 {
					rejected++
				}
			}
			t.Logf("gate rejected %d of %d ticks", rejected, ticks)
			// Binomial(20000, 0.01): mean 200, standard deviation 14.1.
			if rejected < 150 || rejected > 250 {
				t.Errorf("gate rejected %d of %d ticks, want about %d", rejected, ticks, ticks/100)
			}

			// A spike of 20 standard deviations on output 1.
			pl.Step(u)
			pl.OutputTo(y)
			y[1] += 20 * math.Sqrt(s.At(1, 1))
			out := f.Step(u, y, 3)
			if out.Outliers != 2 || out.Used != 1 || !out.Corrected || out.Dof != 1 {
				t.Errorf("spike: outcome %+v, want output 1 rejected, corrected with output 0", out)
			}
			r := make([]float64, 2)
			f.InnovationTo(r)
			if math.IsNaN(r[0]) || !math.IsNaN(r[1]) {
				t.Errorf("spike: innovations %v, want NaN for the rejected output", r)
			}
		})
	}
	t.Run("no gain after the gate", func(t *testing.T) {
		// With only the full-pattern gain, dropping an output leaves no gain.
		g := &GainSet{Name: "full", Form: Current, Gains: []PatternGain{{Outputs: 3, L: kc, S: symOf(s)}}}
		f := NewFilter(mustPrepare(t, md, g, 0.999), nil, nil)
		out := f.Step([]float64{10}, []float64{20 + 100, -3}, 3)
		if out.Outliers != 1 || !out.NoGain || out.Corrected || out.HasNIS {
			t.Errorf("outcome %+v, want output 0 rejected and no gain for output 1", out)
		}
	})
	t.Run("single output spike", func(t *testing.T) {
		f := NewFilter(mustPrepare(t, md, &GainSet{Name: "kf", Form: Kalman}, 0.999), nil, symOf(prior))
		out := f.Step([]float64{10}, []float64{20 + 20*math.Sqrt(s.At(0, 0)), math.NaN()}, 1)
		if out.Outliers != 1 || out.Used != 0 || out.Corrected || out.HasNIS {
			t.Errorf("outcome %+v, want the only output rejected", out)
		}
	})
}

func TestNISConsistency(t *testing.T) {
	// A consistent filter's mean NIS over N ticks lies inside the 95% band
	// of χ²(N·p)/N (SOURCES.md: nis-band); the same filter told
	// that R is ten times smaller than it is falls outside. The fixed gains
	// are the steady-state Kalman gains, from DesignKalman and from the
	// converged Riccati recursion (gonum, above).
	const burn, ticks = 100, 2000
	md := threeModel()
	prior, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	small := mat.NewSymDense(2, nil)
	small.ScaleSym(0.1, md.R)
	_, postS, sS, kcS := refRiccati(md.A, md.C, md.Q, small, 300)
	lo, hi := MeanNISBand(ticks, 2, 0.95)
	design := func(form Form, r *mat.SymDense) *GainSet {
		d := *md
		d.R = r
		g, err := DesignKalman(&d, form, false)
		if err != nil {
			t.Fatal(err)
		}
		return g
	}
	// A fixed gain set judges its innovations with the covariance it
	// propagates from the noise of the model it was prepared for; "R too
	// small" prepares it for a model that claims the small R, while the plant
	// runs with the true one.
	believed := *md
	believed.R = small
	tests := []struct {
		name       string
		set        *GainSet
		consistent bool
		model      *Model // the model the set is prepared for; nil: md
	}{
		{"DesignKalman current form", design(Current, md.R), true, nil},
		{"DesignKalman prediction form", design(Prediction, md.R), true, nil},
		{"DesignKalman current form, R too small", design(Current, small), false, &believed},
		{"DesignKalman prediction form, R too small", design(Prediction, small), false, &believed},
		{"DesignKalman current form designed for R too small, model right", design(Current, small), true, nil},
		{"time-varying kalman", &GainSet{Name: "kf", Form: Kalman}, true, nil},
		{"kalman, R too small", &GainSet{Name: "kf-", Form: Kalman, Q: md.Q, R: small}, false, nil},
		{"steady-state current form", &GainSet{Name: "cur", Form: Current,
			Gains: []PatternGain{{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)}}}, true, nil},
		{"steady-state current form, R too small", &GainSet{Name: "cur-", Form: Current,
			Gains: []PatternGain{{Outputs: 3, L: kcS, S: symOf(sS), P: symOf(postS)}}}, false, &believed},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			pl := NewPlant(md, 2024, nil)
			model := md
			if tc.model != nil {
				model = tc.model
			}
			f := NewFilter(mustPrepare(t, model, tc.set, 0), nil, symOf(prior))
			y := make([]float64, 2)
			sum := 0.0
			for k := 0; k < burn+ticks; k++ {
				u := []float64{10 + math.Sin(0.05*float64(k))}
				pl.Step(u)
				pl.OutputTo(y)
				out := f.Step(u, y, 3)
				if !out.HasNIS || out.Dof != 2 {
					t.Fatalf("tick %d: outcome %+v, want a NIS over 2 outputs", k, out)
				}
				if k >= burn {
					sum += out.NIS
				}
			}
			mean := sum / ticks
			t.Logf("mean NIS %.4f, band [%.4f, %.4f]", mean, lo, hi)
			if inside := mean >= lo && mean <= hi; inside != tc.consistent {
				t.Errorf("mean NIS %.4f, band [%.4f, %.4f]: inside = %v, want %v", mean, lo, hi, inside, tc.consistent)
			}
		})
	}
}

func TestNISConsistencyWithDropouts(t *testing.T) {
	// The time-varying Kalman filter stays consistent when outputs come and
	// go: the sum of its NIS values over the ticks with a NIS is χ² with the
	// summed dof (SOURCES.md: nis-band), which NISWindow's band
	// checks. Told R ten times too small, it is flagged.
	md := threeModel()
	small := mat.NewSymDense(2, nil)
	small.ScaleSym(0.1, md.R)
	patterns := []Pattern{3, 1, 3, 2, 0, 1, 3}
	for _, tc := range []struct {
		name       string
		set        *GainSet
		consistent bool
	}{
		{"kalman", &GainSet{Name: "kf", Form: Kalman}, true},
		{"kalman, R too small", &GainSet{Name: "kf-", Form: Kalman, Q: md.Q, R: small}, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			const ticks = 3000
			pl := NewPlant(md, 99, nil)
			f := NewFilter(mustPrepare(t, md, tc.set, 0), nil, nil)
			w := NewNISWindow(ticks)
			y := make([]float64, 2)
			for k := 0; k < ticks; k++ {
				u := []float64{10 + math.Sin(0.05*float64(k))}
				pl.Step(u)
				pl.OutputTo(y)
				pat := patterns[k%len(patterns)]
				out := f.Step(u, y, pat)
				if out.Used != pat || out.Dof != pat.Len() || out.HasNIS != (pat != 0) {
					t.Fatalf("tick %d, outputs %b: outcome %+v", k, pat, out)
				}
				if out.HasNIS {
					w.Add(out.NIS, out.Dof)
				}
			}
			lo, hi := w.Band(0.95)
			t.Logf("mean NIS %.4f over %d ticks, %d dof; band [%.4f, %.4f]", w.Mean(), w.Len(), w.Dof(), lo, hi)
			if w.Inside(0.95) != tc.consistent {
				t.Errorf("inside the band = %v, want %v", w.Inside(0.95), tc.consistent)
			}
		})
	}
}

func TestGateRelease(t *testing.T) {
	// A filter started far from the truth sees every sample as an outlier.
	// After GateRelease ticks without a correction the gate is set aside for
	// one tick, and the filter pulls in (re-acquiring after a run of gate
	// misses is common practice in tracking).
	md := threeModel()
	_, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	// The time-varying Kalman filter's covariance grows while it coasts,
	// which widens the gate by itself: for it the release is a fallback and
	// only convergence is checked.
	sets := []struct {
		g     *GainSet
		fixed bool
	}{
		{&GainSet{Name: "current", Form: Current, Gains: []PatternGain{{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)}}}, true},
		{&GainSet{Name: "kalman", Form: Kalman}, false},
	}
	for _, c := range sets {
		g := c.g
		t.Run(g.Name, func(t *testing.T) {
			pr := mustPrepare(t, md, g, 0.999)
			// The plant starts 50 standard deviations of the first
			// measurement away from where the filter starts.
			x0 := []float64{20 + 50*math.Sqrt(s.At(0, 0)), 1, -3 - 50*math.Sqrt(s.At(1, 1))}
			pl := NewPlant(md, 11, x0)
			f := NewFilter(pr, nil, nil)
			u, y := []float64{10}, make([]float64, 2)
			released := -1
			for k := 0; k < 400; k++ {
				pl.Step(u)
				pl.OutputTo(y)
				out := f.Step(u, y, 3)
				switch {
				case !c.fixed:
				case k < GateRelease:
					if out.Corrected || out.Outliers == 0 || out.GateReleased {
						t.Fatalf("tick %d: outcome %+v, want every output rejected", k, out)
					}
				case out.GateReleased && released < 0:
					released = k
					if !out.Corrected || out.Outliers != 0 {
						t.Fatalf("tick %d: released gate, outcome %+v, want a correction with every output", k, out)
					}
				}
			}
			if c.fixed && released != GateRelease {
				t.Fatalf("gate released first at tick %d, want %d", released, GateRelease)
			}
			x, truth, sd := make([]float64, 3), make([]float64, 3), make([]float64, 3)
			f.StateTo(x)
			pl.StateTo(truth)
			if !f.StdTo(sd) {
				t.Fatal("no standard deviation")
			}
			for i := range x {
				if e := math.Abs(x[i] - truth[i]); e > 5*sd[i] {
					t.Errorf("state %d after 400 ticks: error %.4g, more than 5σ = %.4g", i, e, 5*sd[i])
				}
			}
		})
	}
}
