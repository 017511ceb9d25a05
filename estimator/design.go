package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/cmplx"
	"strconv"
	"strings"

	"gonum.org/v1/gonum/mat"
)

// maxPatternOutputs is the largest number of outputs for which a design with
// patterns = true designs a gain for every subset of outputs (2^p − 1 of them).
const maxPatternOutputs = 10

// DesignPlaced designs fixed observer gains of the given form (Prediction or
// Current) by pole placement (PlaceObserver), all with the same requested
// error-dynamics poles.
//
// The full pattern comes first. With patterns true, a gain follows for every
// non-empty proper subset of the outputs, in ascending Pattern order, whose
// pair (A, C_s) — (A, C_s·A) for the current form — is observable; subsets
// that are not are left out (the filter then predicts only when just those
// outputs are present); patterns need at most 10 outputs. An unobservable
// full pattern is an error. When m.Q and
// m.R are both set, each gain's S and P are filled from FixedGainCovariance.
// The returned set's Name is empty: the caller names it.
func DesignPlaced(m *Model, form Form, poles []complex128, patterns bool) (*GainSet, error) {
	if err := checkDesignInput(m, form, patterns); err != nil {
		return nil, err
	}
	gs := &GainSet{Form: form}
	for _, s := range designPatterns(m, patterns) {
		full := len(gs.Gains) == 0
		c := OutputRows(m.C, s)
		pair, seen := "(A, C)", mat.Matrix(c)
		if form == Current {
			var ca mat.Dense
			ca.Mul(c, m.A)
			pair, seen = "(A, C·A)", &ca
		}
		if o := CheckObservability(m.A, seen); !o.Observable {
			if full {
				return nil, fmt.Errorf("design: %s is not observable with all outputs (the %v form needs it): %s", pair, form, unseenModes(o, false))
			}
			continue
		}
		l, err := PlaceObserver(m.A, c, form, poles)
		if err != nil {
			return nil, fmt.Errorf("design: outputs %s: %w", patternLabel(m, s), err)
		}
		pg := PatternGain{Outputs: s, L: l, Poles: Eigenvalues(ErrorDynamics(m.A, c, l, form))}
		if m.Q != nil && m.R != nil {
			_, sc, pub, err := FixedGainCovariance(m.A, c, l, form, m.Q, OutputCov(m.R, s))
			if err != nil {
				return nil, fmt.Errorf("design: outputs %s: %w", patternLabel(m, s), err)
			}
			pg.S, pg.P = sc, pub
		}
		gs.Gains = append(gs.Gains, pg)
	}
	return gs, nil
}

// DesignKalman designs fixed observer gains of the given form from the
// steady-state Kalman filter of the model's noise covariances (SteadyStateKalman):
// the prediction form gets L = Lp and P the a priori covariance, the current
// form L = Lc and P the a posteriori one; S is the innovation covariance. m.Q
// and m.R are required.
//
// The full pattern comes first; with patterns true, a gain follows for every
// non-empty proper subset of the outputs, in ascending Pattern order, whose
// pair (A, C_s) is detectable (both forms share their error poles, so the
// current form needs nothing more); patterns need at most 10 outputs. An
// undetectable full pattern is an error.
// The returned set's Name is empty: the caller names it.
func DesignKalman(m *Model, form Form, patterns bool) (*GainSet, error) {
	if err := checkDesignInput(m, form, patterns); err != nil {
		return nil, err
	}
	if m.Q == nil || m.R == nil {
		return nil, errors.New("design: a Kalman design needs the process and measurement noise covariances Q and R")
	}
	gs := &GainSet{Form: form}
	for _, s := range designPatterns(m, patterns) {
		full := len(gs.Gains) == 0
		c := OutputRows(m.C, s)
		if o := CheckObservability(m.A, c); !o.Detectable {
			if full {
				return nil, fmt.Errorf("design: (A, C) is not detectable with all outputs: unstable %s unseen by the outputs", unseenModes(o, true))
			}
			continue
		}
		g, err := SteadyStateKalman(m.A, c, m.Q, OutputCov(m.R, s))
		if err != nil {
			return nil, fmt.Errorf("design: outputs %s: %w", patternLabel(m, s), err)
		}
		pg := PatternGain{Outputs: s, S: g.S}
		if form == Prediction {
			pg.L, pg.P = g.Lp, g.P
		} else {
			pg.L, pg.P = g.Lc, g.Pplus
		}
		pg.Poles = Eigenvalues(ErrorDynamics(m.A, c, pg.L, form))
		gs.Gains = append(gs.Gains, pg)
	}
	return gs, nil
}

func checkDesignInput(m *Model, form Form, patterns bool) error {
	if m == nil {
		return errors.New("design: no model")
	}
	if err := m.Validate(); err != nil {
		return fmt.Errorf("design: %w", err)
	}
	if form != Prediction && form != Current {
		return fmt.Errorf("design: fixed gains are for the prediction or current form, not %v", form)
	}
	if _, _, p := m.Dims(); patterns && p > maxPatternOutputs {
		return fmt.Errorf("design: gains for every subset of %d outputs would be %d designs; at most %d outputs are supported with patterns", p, (1<<uint(min(p, 62)))-1, maxPatternOutputs)
	}
	return nil
}

// designPatterns lists the full pattern, then (with all true) every
// non-empty proper subset in ascending order.
func designPatterns(m *Model, all bool) []Pattern {
	_, _, p := m.Dims()
	full := FullPattern(p)
	out := []Pattern{full}
	if all {
		for s := Pattern(1); s < full; s++ {
			out = append(out, s)
		}
	}
	return out
}

// patternLabel names the outputs of a pattern, by the model's output names
// when it has them.
func patternLabel(m *Model, s Pattern) string {
	idx := s.Indices(nil)
	names := make([]string, len(idx))
	for i, k := range idx {
		if k < len(m.Outputs) && m.Outputs[k].Name != "" {
			names[i] = m.Outputs[k].Name
		} else {
			names[i] = "#" + strconv.Itoa(k)
		}
	}
	return "{" + strings.Join(names, ", ") + "}"
}

// RuleOfThumbPoles returns observer poles about factor times faster than the
// plant's own modes, for the common rule of making the observer a few times
// faster than the plant. A plant eigenvalue λ = e^{sT} of a discrete model
// stands for the continuous-time pole s; the observer pole is e^{factor·sT} =
// λ^factor = exp(factor·ln λ), so its modulus is |λ|^factor and its angle
// factor·arg λ. Edge cases:
//
//   - A real eigenvalue (positive or negative) gives the real pole |λ|^factor:
//     a negative λ has no continuous-time counterpart and the observer need
//     not ring.
//   - A complex pair gives a complex pair whose angle is capped at π/2 (a
//     quarter of the sample rate), so a fast oscillatory mode does not alias.
//   - An eigenvalue with |λ| ≥ 1 (an integrator, a bias state, an unstable
//     mode) has no decay rate of its own; it is given the modulus of the
//     plant's slowest stable mode (0.9 if the plant has none) before the rule
//     is applied.
//   - An eigenvalue with |λ| < 1e-8 (a pure delay) gives a pole at 0.
//
// Poles that come out closer to one another than δ = min(0.02, 0.5/n) —
// repeated plant eigenvalues, several integrators — are moved towards the
// origin in steps of δ until they are at least δ apart, so that placement
// never needs repeated poles. Every pole is strictly inside the unit circle.
// The poles are returned in Eigenvalues order. RuleOfThumbPoles returns nil if
// the eigenvalues of a cannot be computed, and panics if a is not square or
// factor is not a finite positive number.
func RuleOfThumbPoles(a mat.Matrix, factor float64) []complex128 {
	n, nc := a.Dims()
	if n != nc {
		panic(fmt.Sprintf("estimator: RuleOfThumbPoles of a %d×%d matrix, want a square one", n, nc))
	}
	if !(factor > 0) || math.IsInf(factor, 0) {
		panic(fmt.Sprintf("estimator: RuleOfThumbPoles with factor %v, want a finite positive number", factor))
	}
	ev := Eigenvalues(a)
	if ev == nil {
		return nil
	}
	const tiny, fallback = 1e-8, 0.9
	ref := 0.0
	for _, l := range ev {
		if r := cmplx.Abs(l); r < 1 && r > ref {
			ref = r
		}
	}
	if ref < tiny {
		ref = fallback
	}
	delta := math.Min(0.02, 0.5/float64(n))

	// One representative per real pole or conjugate pair (Im > 0).
	var reps []complex128
	for _, l := range ev {
		if imag(l) < 0 {
			continue
		}
		r := cmplx.Abs(l)
		if r < tiny {
			reps = append(reps, 0)
			continue
		}
		if r >= 1 {
			r = ref
		}
		mod := math.Pow(r, factor)
		if imag(l) == 0 {
			reps = append(reps, complex(mod, 0))
			continue
		}
		theta := math.Min(factor*cmplx.Phase(l), math.Pi/2)
		p := cmplx.Rect(mod, theta)
		if imag(p) < delta/2 {
			// A pair this close to the real axis is nearly a repeated
			// pole; keep its members δ apart.
			p = complex(real(p), delta/2)
		}
		reps = append(reps, p)
	}
	sortEigen(reps)
	var out []complex128
	for i, p := range reps {
		for guard := 0; guard < 4*n; guard++ {
			clash := false
			for _, q := range reps[:i] {
				if cmplx.Abs(p-q) < delta || (imag(q) != 0 && cmplx.Abs(p-cmplx.Conj(q)) < delta) {
					clash = true
					break
				}
			}
			if !clash {
				break
			}
			if r := cmplx.Abs(p); imag(p) != 0 && r > delta {
				p *= complex((r-delta)/r, 0)
			} else {
				p -= complex(delta, 0)
			}
		}
		reps[i] = p
		out = append(out, p)
		if imag(p) != 0 {
			out = append(out, cmplx.Conj(p))
		}
	}
	sortEigen(out)
	return out
}
