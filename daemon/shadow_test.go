package daemon

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"

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

// shadowRig runs the cart with the slow placed set active and the Kalman
// filter as the candidate, the simulated cart starting 3 m and 0.8 m/s away
// from the estimators' initial state (1.5 and 0.8 of the initial standard
// deviations of the plant file).
func shadowRig(t testing.TB, candidate string, dwell time.Duration) *cmRig {
	return newCMRig(t, cmRigOptions{active: "slow", candidate: candidate, sets: []string{"slow", "kalman"},
		simX0: []float64{4, 0.8}, seed: 2026, dwell: dwell})
}

// TestShadowSlowSetIsHonest checks that the slow placed set judges its
// innovations with the covariance of its own gain: a consistent filter's NIS
// has mean m (here 1) whatever its gain (SOURCES.md: nis-band, common
// practice), so the windowed NIS mean of the last 200 of 600 ticks, averaged
// over 40 seeded runs, lies near 1. The margin is empirical: over seeds 1–40
// the 40 window means spread with a standard deviation of about 1.1 (their
// innovations are strongly correlated), so their average has a standard
// error of about 0.17, and [0.5, 1.5] is about three of them either side; a
// set that published its design-time σ, or the Kalman filter's, from the
// start would leave it.
func TestShadowSlowSetIsHonest(t *testing.T) {
	const runs = 40
	sum := 0.0
	for s := 1; s <= runs; s++ {
		r := newCMRig(t, cmRigOptions{active: "slow", sets: []string{"slow", "kalman"}, simX0: []float64{4, 0.8}, seed: uint64(s)})
		for k := 0; k < 600; k++ {
			r.tick()
		}
		sum += r.metric("surmise_nis_window_mean", map[string]string{"estimator": "cart", "gains": "slow"})
	}
	if mean := sum / runs; !(mean >= 0.5 && mean <= 1.5) {
		t.Errorf("the slow set's windowed NIS mean averages %.3f over %d runs, want within [0.5, 1.5]: its covariance is not its own", mean, runs)
	}
}

// TestShadowCandidateIsMeasurablyBetter runs the slow placed set (observer
// poles 0.995 and 0.99: time constants of 200 and 100 ticks) against the
// Kalman filter in shadow on the same samples for 600 ticks, and compares
// their windowed consistency over the last 200: the Kalman filter's mean
// NIS lies in the 95 % chi-square band of a 200-tick window (SOURCES.md: nis-band; Bar-Shalom, Li
// and Kirubarajan: 200·mean is χ²(200) for a consistent filter), while its
// innovation RMS is less than half the slow set's (whose own honesty is
// TestShadowSlowSetIsHonest's). The
// candidate never changes the active estimate: a twin run without it
// publishes the same numbers.
func TestShadowCandidateIsMeasurablyBetter(t *testing.T) {
	r := shadowRig(t, "kalman", 0)
	twin := shadowRig(t, "", 0)
	for k := 0; k < 600; k++ {
		r.tick()
		twin.tick()
		if !r.hasCand || r.cand.Gains != "kalman" || r.est.Gains != "slow" {
			t.Fatalf("tick %d: active %s, candidate %v %s", k, r.est.Gains, r.hasCand, r.cand.Gains)
		}
		for i := range r.est.States {
			if a, b := r.est.States[i].Value, twin.est.States[i].Value; a != b {
				t.Fatalf("tick %d: state %d is %v with a candidate, %v without", k, i, a, b)
			}
		}
	}
	lo, hi := estimator.MeanNISBand(200, 1, 0.95)
	stats := func(gains string) (mean, blo, bhi, rms float64) {
		l := map[string]string{"estimator": "cart", "gains": gains}
		return r.metric("surmise_nis_window_mean", l), r.metric("surmise_nis_band_lower", l), r.metric("surmise_nis_band_upper", l),
			r.metric("surmise_innovation_rms", map[string]string{"estimator": "cart", "gains": gains, "output": "position_pv"})
	}
	km, klo, khi, krms := stats("kalman")
	sm, _, _, srms := stats("slow")
	t.Logf("kalman: NIS mean %.3f in [%.3f, %.3f], innovation RMS %.4f m; slow: NIS mean %.3f, RMS %.4f m", km, klo, khi, krms, sm, srms)
	if math.Abs(klo-lo) > 1e-9 || math.Abs(khi-hi) > 1e-9 {
		t.Errorf("band [%v, %v] in the metrics, want MeanNISBand(200, 1) = [%v, %v]", klo, khi, lo, hi)
	}
	if !(km >= lo && km <= hi) {
		t.Errorf("the Kalman candidate's windowed NIS mean %v is outside [%v, %v]", km, lo, hi)
	}
	// The slow set's innovations are far from white (its error decays over
	// 100 to 200 ticks), so one 200-tick window of its NIS is not χ²(200)/200
	// and its band says little: its honesty is judged over many runs
	// instead (slowSetNISOverSeeds).
	// The factor is empirical: with this seed the candidate's innovation
	// RMS is 0.12 m against the slow set's 2.59 m (a twentieth); half is a
	// wide margin for "measurably better".
	if !(krms < 0.5*srms) {
		t.Errorf("innovation RMS: candidate %v, active %v; want the candidate's below half", krms, srms)
	}
	st := r.c.Status()
	if st.Shadow == nil || st.Shadow.Gains != "kalman" || st.Tick == nil || st.Tick.Gains != "slow" {
		t.Fatalf("status tick %+v shadow %+v", st.Tick, st.Shadow)
	}
	if float64(st.Shadow.NISMean) != km || float64(st.Tick.NISMean) != sm {
		t.Errorf("status NIS means %v and %v, metrics %v and %v", st.Shadow.NISMean, st.Tick.NISMean, km, sm)
	}
}

// TestPromote promotes the Kalman candidate both ways and rolls back.
func TestPromote(t *testing.T) {
	t.Run("keep-state", func(t *testing.T) {
		r := shadowRig(t, "kalman", -1)
		for k := 0; k < 100; k++ {
			r.tick()
		}
		// What the slow prediction-form set leaves for the next tick: its
		// estimate x̂(k|k−1), the input held and its pending correction
		// L·r(k), which enters the next prediction whatever the gains.
		xPrev := []float64{r.est.States[0].Value - 1, r.est.States[1].Value}
		uPrev, rPrev := r.u[0], r.est.Outputs[0].Innovation
		lSlow := cmSet(t, r.plant.Model, "slow").Set.Gains[0].L
		rep, err := r.c.Promote(PromoteRequest{}, Origin{Who: "reply-subject: _INBOX.x", Claimed: "ann@bench"})
		if err != nil {
			t.Fatal(err)
		}
		if !rep.Applied || rep.Transfer != KeepState || rep.Active.Name != "kalman" || rep.Previous.Name != "slow" || rep.Jump != nil {
			t.Fatalf("reply %+v", rep)
		}
		r.tick()
		if r.est.Gains != "kalman" || r.hasCand {
			t.Fatalf("after promotion: active %s, candidate lane %v", r.est.Gains, r.hasCand)
		}
		// No jump from the swap itself: the Kalman set predicts from the
		// slow set's state, x̂(k+1|k) = A·x̂ + B·u + L·r (A, B of the
		// cart), and corrects the position by K·r with 0 ≤ K < 1 for
		// one position measurement: between the prediction and y.
		pred := 1 + (xPrev[0] + 0.1*xPrev[1]) + 0.005*uPrev + lSlow.At(0, 0)*rPrev
		if got := r.est.Outputs[0].Predicted; math.Abs(got-pred) > 1e-9 {
			t.Errorf("predicted position after keep-state %v, want %v from the slow set's state", got, pred)
		}
		lo, hi := math.Min(pred, r.y[0]), math.Max(pred, r.y[0])
		if got := r.est.States[0].Value; got < lo-1e-12 || got > hi+1e-12 {
			t.Errorf("position after keep-state %v, not between the prediction %v and the measurement %v", got, pred, r.y[0])
		}
		tail := r.audit.Tail("cart", 1)
		if len(tail) != 1 || tail[0].Action != "promote" || tail[0].Transfer != "keep-state" ||
			tail[0].Origin != "reply-subject: _INBOX.x" || tail[0].ClaimedBy != "ann@bench" {
			t.Errorf("audit %+v", tail)
		}
		if _, err := r.c.Rollback(Origin{}); err != nil {
			t.Fatal(err)
		}
		r.tick()
		if r.est.Gains != "slow" {
			t.Errorf("after rollback: %s", r.est.Gains)
		}
	})
	t.Run("adopt-state", func(t *testing.T) {
		r := shadowRig(t, "kalman", -1)
		twin := shadowRig(t, "kalman", -1)
		if _, err := r.c.Promote(PromoteRequest{Transfer: AdoptState, Confirm: true}, Origin{}); err == nil ||
			!strings.Contains(err.Error(), "has not run a tick") {
			t.Fatalf("adopt before any tick: %v", err)
		}
		for k := 0; k < 100; k++ {
			r.tick()
			twin.tick()
		}
		rep, err := r.c.Promote(PromoteRequest{Transfer: AdoptState}, Origin{})
		if err != nil {
			t.Fatal(err)
		}
		dx := r.cand.States[0].Value - r.est.States[0].Value
		dv := r.cand.States[1].Value - r.est.States[1].Value
		if rep.Applied || rep.Jump == nil || math.Abs(rep.Jump.Norm-math.Hypot(dx, dv)) > 1e-12 ||
			rep.Jump.States[0].Name != "position" || rep.Jump.States[0].Difference != dx {
			t.Fatalf("unconfirmed reply %+v", rep)
		}
		if rep.Jump.Norm < 0.1 {
			t.Errorf("jump %v: the slow set should still lag the Kalman filter", rep.Jump.Norm)
		}
		r.tick()
		twin.tick()
		if r.est.Gains != "slow" || !r.hasCand || r.c.Status().Active.Name != "slow" {
			t.Fatalf("an unconfirmed adopt-state changed something")
		}
		if _, err := r.c.Promote(PromoteRequest{Transfer: AdoptState, Confirm: true}, Origin{}); err != nil {
			t.Fatal(err)
		}
		r.tick()
		twin.tick()
		// The active lane is now the candidate's lane: the same numbers
		// as the twin's candidate.
		if r.est.Gains != "kalman" || r.hasCand {
			t.Fatalf("after adopt-state: active %s, candidate lane %v", r.est.Gains, r.hasCand)
		}
		for i := range r.est.States {
			if a, b := r.est.States[i].Value, twin.cand.States[i].Value; a != b {
				t.Errorf("state %d: %v after adopting, the candidate lane gives %v", i, a, b)
			}
		}
		if tail := r.audit.Tail("cart", 1); len(tail) != 1 || tail[0].Transfer != "adopt-state" || tail[0].Jump == nil {
			t.Errorf("audit %+v", tail)
		}
	})
}

// TestPromoteRefusals covers the refused promotions and roll-backs and the
// minimum dwell time.
func TestPromoteRefusals(t *testing.T) {
	r := shadowRig(t, "kalman", 10*time.Second)
	r.tick()
	code := func(err error) string {
		var ce *CommissionError
		if errors.As(err, &ce) {
			return ce.Code
		}
		return fmt.Sprint(err)
	}
	if _, err := r.c.Promote(PromoteRequest{Transfer: "swap"}, Origin{}); code(err) != CodeBadRequest {
		t.Errorf("unknown transfer: %v", err)
	}
	if _, err := r.c.Rollback(Origin{}); code(err) != CodeRefused || !strings.Contains(err.Error(), "nothing to roll back") {
		t.Errorf("rollback with no previous set: %v", err)
	}
	if _, err := r.c.Promote(PromoteRequest{}, Origin{}); err != nil {
		t.Fatal(err)
	}
	if _, err := r.c.Promote(PromoteRequest{}, Origin{}); code(err) != CodeRefused || !strings.Contains(err.Error(), "nothing to promote") {
		t.Errorf("promote with no candidate: %v", err)
	}
	_, err := r.c.Rollback(Origin{})
	if code(err) != CodeRefused || !strings.Contains(err.Error(), "try again in 10 s") {
		t.Errorf("rollback within the dwell time: %v", err)
	}
	r.clock.Advance(4 * time.Second)
	if _, err := r.c.Rollback(Origin{}); err == nil || !strings.Contains(err.Error(), "try again in 6 s") {
		t.Errorf("rollback 4 s later: %v", err)
	}
	if st := r.c.Status(); st.DwellLeft != 6 || st.MinDwell != 10 {
		t.Errorf("status dwell %v of %v s", st.DwellLeft, st.MinDwell)
	}
	r.clock.Advance(6 * time.Second)
	if _, err := r.c.Rollback(Origin{}); err != nil {
		t.Errorf("rollback after the dwell time: %v", err)
	}
	if got := r.reloads("refused"); got != 0 {
		t.Errorf("refused promotions counted as %v refused reloads", got)
	}
}

// TestReset resets the state and refuses malformed requests.
func TestReset(t *testing.T) {
	r := newCMRig(t, cmRigOptions{active: "fast", seed: 5,
		repl: []string{"{name: position, unit: m, nominal: 1}", "{name: position, unit: m, nominal: 1, range: [-100, 100]}"}})
	for k := 0; k < 20; k++ {
		r.tick()
	}
	for _, c := range []struct {
		name string
		req  ResetRequest
		want string
	}{
		{"unknown state", ResetRequest{State: map[string]float64{"speed": 1}}, `state "speed": no such state`},
		{"not finite", ResetRequest{State: map[string]float64{"position": math.Inf(1)}}, "not a finite number"},
		{"outside the range", ResetRequest{State: map[string]float64{"position": 1.7e308}, Confirm: true}, `state "position": 1.7e+308 is outside its range [-100, 100]`},
		{"std missing a state", ResetRequest{Std: map[string]float64{"position": 1}}, "missing velocity"},
		{"std not positive", ResetRequest{Std: map[string]float64{"position": 1, "velocity": 0}}, "want a finite positive number"},
		{"std and covariance", ResetRequest{Std: map[string]float64{"position": 1, "velocity": 1}, Covariance: [][]float64{{1, 0}, {0, 1}}}, "not both"},
		// [[1, 2], [2, 1]] has eigenvalues 3 and −1.
		{"covariance indefinite", ResetRequest{Covariance: [][]float64{{1, 2}, {2, 1}}}, "not positive definite"},
		{"covariance shape", ResetRequest{Covariance: [][]float64{{1, 0}}}, "1 rows, want 2"},
	} {
		t.Run(c.name, func(t *testing.T) {
			_, err := r.c.Reset(c.req, Origin{})
			var ce *CommissionError
			if !errors.As(err, &ce) || ce.Code != CodeBadRequest || !strings.Contains(ce.Error(), c.want) {
				t.Errorf("error %v, want a bad request saying %q", err, c.want)
			}
		})
	}
	req := ResetRequest{State: map[string]float64{"position": 5}, Std: map[string]float64{"position": 0.5, "velocity": 0.2}}
	// Without confirm: the jump from the latest estimate, nothing changes.
	shown, err := r.c.Reset(req, Origin{})
	if err != nil {
		t.Fatal(err)
	}
	if shown.Applied || shown.Jump == nil || shown.Jump.States[0].Candidate != 5 ||
		shown.Jump.States[0].Difference != 5-r.est.States[0].Value {
		t.Fatalf("unconfirmed reset %+v", shown)
	}
	if tail := r.audit.Tail("cart", 1); len(tail) == 1 && tail[0].Action == "reset" {
		t.Fatalf("an unconfirmed reset was audited: %+v", tail)
	}
	req.Confirm = true
	rep, err := r.c.Reset(req, Origin{})
	if err != nil {
		t.Fatal(err)
	}
	if !rep.Applied {
		t.Fatalf("confirmed reset not applied: %+v", rep)
	}
	if rep.State["position"] != 5 || rep.State["velocity"] != 0 {
		t.Errorf("reply state %v", rep.State)
	}
	r.tick()
	// The first step after a reset does not predict, and a reset with a
	// covariance acquires with the Kalman gain (estimator.Filter): with
	// P = diag(0.5², 0.2²), C = [1 0] and R = 0.1², K = (0.25/0.26, 0) and
	// x̂ = x_reset + K·(y − C·x_reset), in deviations from the nominal (1, 0):
	// x_reset = (4, 0).
	innov := (r.y[0] - 1) - 4
	want := []float64{1 + 4 + 0.25/0.26*innov, 0}
	for i, w := range want {
		if got := r.est.States[i].Value; math.Abs(got-w) > 1e-12 {
			t.Errorf("state %d after the reset: %v, want %v", i, got, w)
		}
	}
	if tail := r.audit.Tail("cart", 1); len(tail) != 1 || tail[0].Action != "reset" || !strings.Contains(tail[0].Note, "position=5") {
		t.Errorf("audit %+v", tail)
	}
}

// TestTickWithShadowAllocs: a tick with a candidate lane, the candidate's
// estimate and the commissioner's view of both allocate nothing (after the
// windows have filled and their bands are cached).
func TestTickWithShadowAllocs(t *testing.T) {
	r := shadowRig(t, "kalman", 0)
	for k := 0; k < 400; k++ {
		r.tick()
	}
	if !r.hasCand {
		t.Fatal("no candidate lane")
	}
	if a := testing.AllocsPerRun(200, r.tick); a != 0 {
		t.Errorf("%v allocations per tick with a shadow lane, want 0", a)
	}
}

func BenchmarkTickWithShadow(b *testing.B) {
	r := shadowRig(b, "kalman", 0)
	for k := 0; k < 400; k++ {
		r.tick()
	}
	b.ReportAllocs()
	for b.Loop() {
		r.tick()
	}
}
