package main

import (
	"flag"
	"fmt"
	"math"
	"math/cmplx"
	"strconv"
	"strings"
)

// parseArgs parses the flags of a verb wherever they stand among its
// positional arguments (`surmise check plant.yaml --json` as well as
// `surmise check --json plant.yaml`); everything after "--" is positional.
// It returns the positional arguments. A bad flag has already been reported
// by the flag set on the verb's stderr, with the usage; the returned error
// then makes run exit with status 2 without saying it again. -h and -help
// return flag.ErrHelp.
func parseArgs(fs *flag.FlagSet, args []string) ([]string, error) {
	var pos []string
	for {
		if err := fs.Parse(args); err != nil {
			if err == flag.ErrHelp {
				return nil, err
			}
			return nil, &exitError{code: 2}
		}
		rest := fs.Args()
		if len(rest) == 0 {
			return pos, nil
		}
		if used := len(args) - len(rest); used > 0 && args[used-1] == "--" {
			return append(pos, rest...), nil
		}
		pos = append(pos, rest[0])
		args = rest[1:]
	}
}

// usageError is a command-line mistake found after the flags were parsed:
// run prints it after the verb's name and exits with status 2.
func usageError(format string, args ...any) error {
	return fmt.Errorf("%w: %s", errUsage, fmt.Sprintf(format, args...))
}

// fnum formats a number for a report: six significant digits, no "-0".
func fnum(x float64) string {
	if x == 0 {
		return "0"
	}
	return strconv.FormatFloat(x, 'g', 6, 64)
}

// fpole formats an eigenvalue as "0.81" or "0.5+0.2i" with six significant
// digits per part.
func fpole(c complex128) string {
	if imag(c) == 0 {
		return fnum(real(c))
	}
	sign := "+"
	if imag(c) < 0 {
		sign = "-"
	}
	return fnum(real(c)) + sign + fnum(math.Abs(imag(c))) + "i"
}

// fpair formats one member of a complex-conjugate pair as "0.5±0.2i", and a
// real eigenvalue as fpole does.
func fpair(c complex128) string {
	if imag(c) == 0 {
		return fnum(real(c))
	}
	return fnum(real(c)) + "±" + fnum(math.Abs(imag(c))) + "i"
}

// fpoles formats a list of eigenvalues as fpair does, writing each
// complex-conjugate pair once (the lists come from estimator.Eigenvalues,
// which puts the member with a positive imaginary part first).
func fpoles(ps []complex128) string {
	var s []string
	for i := 0; i < len(ps); i++ {
		if imag(ps[i]) > 0 && i+1 < len(ps) && ps[i+1] == cmplx.Conj(ps[i]) {
			s = append(s, fpair(ps[i]))
			i++
			continue
		}
		s = append(s, fpole(ps[i]))
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
