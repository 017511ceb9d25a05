package check

import (
	"math"
	"math/cmplx"
	"strconv"
	"strings"
)

// FormatNum formats a number for a report: six significant digits, no "-0".
// A number that six digits would round to ±1 but is not ±1 (an eigenvalue
// of 0.99999978) gets the digits that show how far from 1 it is: "1" is
// printed only for 1.
func FormatNum(x float64) string {
	if x == 0 {
		return "0"
	}
	s := strconv.FormatFloat(x, 'g', 6, 64)
	if (s == "1" || s == "-1") && math.Abs(x) != 1 {
		d := int(math.Ceil(-math.Log10(math.Abs(math.Abs(x)-1)))) + 2
		s = strconv.FormatFloat(x, 'g', min(d, 17), 64)
	}
	return s
}

// FormatPole formats an eigenvalue as "0.81" or "0.5+0.2i" with six significant
// digits per part.
func FormatPole(c complex128) string {
	if imag(c) == 0 {
		return FormatNum(real(c))
	}
	sign := "+"
	if imag(c) < 0 {
		sign = "-"
	}
	return FormatNum(real(c)) + sign + FormatNum(math.Abs(imag(c))) + "i"
}

// fpair formats one member of a complex-conjugate pair as "0.5±0.2i", and a
// real eigenvalue as FormatPole does.
func fpair(c complex128) string {
	if imag(c) == 0 {
		return FormatNum(real(c))
	}
	return FormatNum(real(c)) + "±" + FormatNum(math.Abs(imag(c))) + "i"
}

// FormatPoles formats a list of eigenvalues as fpair does, writing each
// complex-conjugate pair once (the lists come from estimator.Eigenvalues,
// which puts the member with a positive imaginary part first).
func FormatPoles(ps []complex128) string {
	var s []string
	for i := 0; i < len(ps); i++ {
		if imag(ps[i]) > 0 && i+1 < len(ps) && ps[i+1] == cmplx.Conj(ps[i]) {
			s = append(s, fpair(ps[i]))
			i++
			continue
		}
		s = append(s, FormatPole(ps[i]))
	}
	return strings.Join(s, ", ")
}

// fsec formats a time in seconds with three significant digits in a unit that
// keeps the number readable.
func fsec(s float64) string {
	switch {
	case math.IsInf(s, 1):
		return "∞"
	case s == 0:
		return "0 s"
	case s < 1:
		return strconv.FormatFloat(s*1000, 'g', 3, 64) + " ms"
	case s < 120:
		return strconv.FormatFloat(s, 'g', 3, 64) + " s"
	case s < 2*3600:
		return strconv.FormatFloat(s/60, 'g', 3, 64) + " min"
	case s < 2*86400:
		return strconv.FormatFloat(s/3600, 'g', 3, 64) + " h"
	}
	return strconv.FormatFloat(s/86400, 'g', 3, 64) + " d"
}

// round10 rounds x to ten significant digits, for JSON reports: enough for
// any engineering use, and stable across machines where the last bits of a
// computed value may differ.
func round10(x float64) float64 {
	if x == 0 {
		return 0 // and not −0
	}
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return x
	}
	r, _ := strconv.ParseFloat(strconv.FormatFloat(x, 'g', 10, 64), 64)
	return r
}

// convergence returns −Ts/ln ρ, the time constant of the slowest error mode
// of error dynamics with spectral radius ρ < 1 (0 for ρ = 0, +Inf for ρ ≥ 1).
func convergence(ts, rho float64) float64 {
	switch {
	case rho == 0:
		return 0
	case rho >= 1:
		return math.Inf(1)
	}
	return -ts / math.Log(rho)
}
