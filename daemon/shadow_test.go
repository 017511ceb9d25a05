package daemon

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

// shIntegratorSet prepares a current-form set with the scalar gain l for the
// integrator of engIntegrator: x̂(k|k) = x̂(k|k−1) + l·(y − x̂(k|k−1)), error
// dynamics 1 − l.
func shIntegratorSet(t testing.TB, md *estimator.Model, name string, l float64) *estimator.Prepared {
	t.Helper()
	gs := &estimator.GainSet{Name: name, Form: estimator.Current, Gains: []estimator.PatternGain{
		{Outputs: 1, L: mat.NewDense(1, 1, []float64{l})},
	}}
	p, err := estimator.Prepare(md, gs, 0)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// TestEngineLaneOps runs the queued lane changes on the integrator
// x(k+1) = x(k) + u − U0 with u = U0 and y = 4 at every tick, so that every
// expected value is a few lines of arithmetic (worked out in each case's
// comment). Before the ops, two ticks have run: the active lane "half"
// (l = 0.5) from 0 to 2 to 3, the candidate "quarter" (l = 0.25) from 0 to 1
// to 1.75.
func TestEngineLaneOps(t *testing.T) {
	md := engIntegrator(0)
	pl := engPlant(md, 0, -100, 100, 10)
	pl.InitialCov = nil
	half := shIntegratorSet(t, md, "half", 0.5)
	quarter := shIntegratorSet(t, md, "quarter", 0.25)
	cases := []struct {
		name      string
		ops       []laneOp
		wantGains string
		wantX     float64
		wantCand  string // "" for no candidate lane
		wantCandX float64
	}{
		// Nothing queued: 3 + 0.5·(4 − 3) = 3.5; 1.75 + 0.25·2.25 = 2.3125.
		{"none", nil, "half", 3.5, "quarter", 2.3125},
		// Keep-state promotion: the active lane's 3 with quarter's gain:
		// 3 + 0.25·1 = 3.25; the shadow lane stops.
		{"promote keep-state", []laneOp{{kind: opPromote}}, "quarter", 3.25, "", 0},
		// Adopt-state: the candidate lane, 1.75 + 0.25·2.25 = 2.3125.
		{"promote adopt-state", []laneOp{{kind: opPromote, adopt: true}}, "quarter", 2.3125, "", 0},
		// Adopt, then back to half within the same tick period, in that
		// order: the adopted lane's 1.75 with half's gain, 1.75 + 0.5·2.25.
		{"adopt then active", []laneOp{{kind: opPromote, adopt: true}, {kind: opActive, prep: half}}, "half", 2.875, "", 0},
		// The same two ops the other way round: half is already active,
		// then the candidate lane is adopted: 2.3125 as in adopt-state.
		{"active then adopt", []laneOp{{kind: opActive, prep: half}, {kind: opPromote, adopt: true}}, "quarter", 2.3125, "", 0},
		// Removing the candidate, then promoting: nothing to promote.
		{"remove then promote", []laneOp{{kind: opCandidate}, {kind: opPromote, adopt: true}}, "half", 3.5, "", 0},
		// A new candidate starts from the active estimate of the last
		// tick, 3, without a prediction: 3 + 0.5·1 = 3.5 for a half
		// candidate, while the active lane runs quarter: 3 + 0.25 = 3.25.
		{"swap roles", []laneOp{{kind: opActive, prep: quarter}, {kind: opCandidate, prep: half}}, "quarter", 3.25, "half", 3.5},
		// Reset to 7: no prediction, 7 + 0.5·(4 − 7) = 5.5 and
		// 7 + 0.25·(4 − 7) = 6.25.
		{"reset", []laneOp{{kind: opReset, x: []float64{7}}}, "half", 5.5, "quarter", 6.25},
		// Reset to the operating point (0): 0 + 0.5·4 = 2, 0 + 0.25·4 = 1.
		{"reset to operating point", []laneOp{{kind: opReset}}, "half", 2, "quarter", 1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			e := NewEngine(pl, half, EngineOptions{Candidate: quarter})
			est, cand := e.NewEstimate(), e.NewEstimate()
			tick := func(k int) {
				if _, ok := e.Offer(0, 0, engAt(float64(k)), engAt(float64(k))); !ok {
					t.Fatal("input refused")
				}
				if _, ok := e.Offer(1, 4, engAt(float64(k)), engAt(float64(k))); !ok {
					t.Fatal("output refused")
				}
				e.Tick(engAt(float64(k)), est)
			}
			tick(0)
			tick(1)
			if got := est.States[0].Value; got != 3 {
				t.Fatalf("before the ops: x = %v, want 3", got)
			}
			e.enqueue(c.ops...)
			tick(2)
			if est.Gains != c.wantGains || math.Abs(est.States[0].Value-c.wantX) > 1e-12 {
				t.Errorf("active: gains %s, x = %v; want %s, %v", est.Gains, est.States[0].Value, c.wantGains, c.wantX)
			}
			has := e.CandidateTo(cand)
			switch {
			case c.wantCand == "" && has:
				t.Errorf("a candidate lane (%s) runs, want none", cand.Gains)
			case c.wantCand != "" && !has:
				t.Errorf("no candidate lane, want %s", c.wantCand)
			case has && (cand.Gains != c.wantCand || math.Abs(cand.States[0].Value-c.wantCandX) > 1e-12):
				t.Errorf("candidate: gains %s, x = %v; want %s, %v", cand.Gains, cand.States[0].Value, c.wantCand, c.wantCandX)
			}
		})
	}
}

func TestShadowSubject(t *testing.T) {
	for _, c := range []struct{ in, want string }{
		{"surmise.hwl.estimate", "surmise.hwl.shadow.estimate"},
		{"plant7.est.estimate", "plant7.est.shadow.estimate"},
		{"odd", "odd.shadow"},
	} {
		if got := ShadowSubject(c.in); got != c.want {
			t.Errorf("ShadowSubject(%q) = %q, want %q", c.in, got, c.want)
		}
	}
}
