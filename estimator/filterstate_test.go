package estimator

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// TestFilterStateRerun saves the state before every Step of a run, goes back
// to the state saved before tick 20 and steps again on the same samples: the
// estimates and covariances are bit for bit those of the first pass, for
// every form, through coasting, outliers, acquisition and settling. It
// allocates nothing.
func TestFilterStateRerun(t *testing.T) {
	md := threeModel()
	prior, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	var lp mat.Dense
	lp.Mul(md.A, kc)
	sets := map[string]*GainSet{
		"current":    {Name: "cur", Form: Current, Gains: []PatternGain{{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)}}},
		"prediction": {Name: "pred", Form: Prediction, Gains: []PatternGain{{Outputs: 3, L: &lp, S: symOf(s), P: symOf(prior)}}},
		"kalman":     {Name: "kf", Form: Kalman},
	}
	const ticks = 60
	for name, set := range sets {
		t.Run(name, func(t *testing.T) {
			f := NewFilter(mustPrepare(t, md, set, 0.99), nil, symOf(prior))
			pl := NewPlant(md, 9, nil)
			us, ys := make([][]float64, ticks), make([][]float64, ticks)
			pats := make([]Pattern, ticks)
			states := make([]*FilterState, ticks)
			xs, ps := make([][]float64, ticks), make([]*mat.SymDense, ticks)
			for k := range ticks {
				us[k] = []float64{10 + math.Sin(0.1*float64(k))}
				pl.Step(us[k])
				ys[k] = make([]float64, 2)
				pl.OutputTo(ys[k])
				pats[k] = Pattern(3)
				if k%7 == 3 {
					pats[k] = 1
				}
				if k%11 == 5 {
					ys[k][1] += 50 // an outlier
				}
				states[k] = f.NewState()
				f.SaveTo(states[k])
				f.Step(us[k], ys[k], pats[k])
				xs[k] = make([]float64, 3)
				f.StateTo(xs[k])
				ps[k] = &mat.SymDense{}
				f.CovarianceTo(ps[k])
			}
			f.RestoreFrom(states[20])
			for k := 20; k < ticks; k++ {
				f.Step(us[k], ys[k], pats[k])
				sameAsFirstPass(t, f, k, xs[k], ps[k])
			}
			st := f.NewState()
			if a := testing.AllocsPerRun(20, func() { f.SaveTo(st); f.RestoreFrom(st) }); a != 0 {
				t.Errorf("SaveTo and RestoreFrom allocate %v times, want 0", a)
			}
		})
	}
}

// TestFilterStateSettled saves a settled tracked filter (whose P is not
// copied: it is the set's steady state), lets it leave the steady state on a
// missing output, restores the save and re-runs: estimates and covariances
// are bit for bit those of the first pass.
func TestFilterStateSettled(t *testing.T) {
	md := threeModel()
	_, post, s, kc := refRiccati(md.A, md.C, md.Q, md.R, 300)
	set := &GainSet{Name: "cur", Form: Current, Gains: []PatternGain{{Outputs: 3, L: kc, S: symOf(s), P: symOf(post)}}}
	f := NewFilter(mustPrepare(t, md, set, 0.99), nil, nil) // tracked, no p0: starts settled
	pl := NewPlant(md, 4, nil)
	const ticks, saveAt, gapAt = 40, 10, 15
	us, ys := make([][]float64, ticks), make([][]float64, ticks)
	xs, ps := make([][]float64, ticks), make([]*mat.SymDense, ticks)
	saved := f.NewState()
	for k := range ticks {
		us[k] = []float64{10 + math.Sin(0.1*float64(k))}
		pl.Step(us[k])
		ys[k] = make([]float64, 2)
		pl.OutputTo(ys[k])
		if k == saveAt {
			if !f.settled {
				t.Fatalf("tick %d: the filter is not settled; the test needs it to be", k)
			}
			f.SaveTo(saved)
		}
		pat := Pattern(3)
		if k == gapAt {
			pat = 1
		}
		f.Step(us[k], ys[k], pat)
		if k == gapAt && f.settled {
			t.Fatal("still settled after a missing output; the test needs it to leave")
		}
		xs[k] = make([]float64, 3)
		f.StateTo(xs[k])
		ps[k] = &mat.SymDense{}
		f.CovarianceTo(ps[k])
	}
	f.RestoreFrom(saved)
	for k := saveAt; k < ticks; k++ {
		pat := Pattern(3)
		if k == gapAt {
			pat = 1
		}
		f.Step(us[k], ys[k], pat)
		sameAsFirstPass(t, f, k, xs[k], ps[k])
	}
}

// sameAsFirstPass fails the test unless f's state and covariance after tick
// k of a re-run are bit for bit x and p, those of the first pass.
func sameAsFirstPass(t *testing.T, f *Filter, k int, x []float64, p *mat.SymDense) {
	t.Helper()
	got := make([]float64, len(x))
	f.StateTo(got)
	for i := range x {
		if got[i] != x[i] {
			t.Fatalf("tick %d: x̂[%d] = %v on the re-run, %v the first time", k, i, got[i], x[i])
		}
	}
	var gp mat.SymDense
	f.CovarianceTo(&gp)
	if !mat.Equal(&gp, p) {
		t.Fatalf("tick %d: P differs on the re-run", k)
	}
}
