package check

import (
	"math"
	"math/cmplx"
	"testing"
)

// TestEigenKinds checks the description of single eigenvalues: a
// continuous-time pole s sampled at Ts becomes λ = e^{s·Ts} (zero-order
// hold, SOURCES.md: zoh-eigenvalues), so a mode e^{−t/τ}·cos(ωt) has time constant τ and
// period 2π/ω.
func TestEigenKinds(t *testing.T) {
	const ts = 0.5
	inf := math.Inf(1)
	for _, tc := range []struct {
		name        string
		l           complex128
		kind        string
		tau, period float64 // +Inf: null in the report
	}{
		{"deadbeat", 0, "deadbeat", inf, inf},
		{"integrator", 1, "integrator", inf, inf},
		{"alternating on the unit circle", -1, "marginal", inf, 2 * ts},
		{"undamped oscillation", cmplx.Exp(complex(0, 0.5*ts)), "marginal", inf, 2 * math.Pi / 0.5},
		{"damped oscillation, τ = 10 s, ω = 0.5 rad/s", cmplx.Exp(complex(-0.1*ts, 0.5*ts)), "stable", 10, 2 * math.Pi / 0.5},
		{"lag, τ = 2 s", complex(math.Exp(-ts/2), 0), "stable", 2, inf},
		{"negative real, alternating", -0.5, "stable", -ts / math.Log(0.5), 2 * ts},
		{"unstable, grows ×e in 4 s", complex(math.Exp(ts/4), 0), "unstable", 4, inf},
	} {
		e := eigen(tc.l, ts)
		if e.Kind != tc.kind {
			t.Errorf("%s: kind %q, want %q", tc.name, e.Kind, tc.kind)
		}
		for _, c := range []struct {
			what string
			got  *float64
			want float64
		}{{"time constant", e.TimeConstantSeconds, tc.tau}, {"period", e.PeriodSeconds, tc.period}} {
			switch {
			case c.got == nil && math.IsInf(c.want, 1):
			case c.got == nil:
				t.Errorf("%s: no %s, want %v", tc.name, c.what, c.want)
			case math.IsInf(c.want, 1):
				t.Errorf("%s: %s %v, want none", tc.name, c.what, *c.got)
			case math.Abs(*c.got-c.want) > 1e-9*c.want:
				t.Errorf("%s: %s %v, want %v", tc.name, c.what, *c.got, c.want)
			}
		}
	}
}
