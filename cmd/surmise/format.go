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
// It returns the positional arguments. -h and --help print the verb's help on
// its stdout and return flag.ErrHelp. A bad flag returns an exitError with
// status 2 and a one-line message that suggests the flag meant, if one is
// close, and where to find the usage.
func parseArgs(fs *flag.FlagSet, args []string) ([]string, error) {
	help := fs.Usage
	fs.Usage = func() {}
	defer func() { fs.Usage = help }()
	var pos []string
	for {
		if err := fs.Parse(args); err != nil {
			if err == flag.ErrHelp {
				help()
				return nil, err
			}
			return nil, &exitError{code: 2, msg: flagErrorMessage(fs, err)}
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

// flagErrorMessage turns the flag package's error into one line in the
// command's own terms ("--dat", not "-dat"), with the closest defined flag
// for an unknown one, and a pointer to the help.
func flagErrorMessage(fs *flag.FlagSet, err error) string {
	msg := err.Error()
	if name, ok := strings.CutPrefix(msg, "flag provided but not defined: -"); ok {
		var names []string
		fs.VisitAll(func(f *flag.Flag) { names = append(names, f.Name) })
		msg = "unknown flag --" + name
		if s := closest(name, names); s != "" {
			msg += " (did you mean --" + s + "?)"
		}
	} else if name, ok := strings.CutPrefix(msg, "flag needs an argument: -"); ok {
		msg = "flag --" + name + " needs a value"
	} else if rest, ok := strings.CutPrefix(msg, "invalid value "); ok {
		msg = "invalid value " + strings.Replace(rest, " for flag -", " for --", 1)
	}
	return msg + "\nRun 'surmise " + fs.Name() + " -h' for its usage and flags."
}

// closest returns the word of words nearest to w: one that starts with w or
// that w starts with, else the one at the smallest edit distance when that is
// at most a third of w's length (and at least 1); "" when none is close.
func closest(w string, words []string) string {
	best, bestD := "", len(w)/3
	if bestD < 1 {
		bestD = 1
	}
	for _, c := range words {
		if len(w) >= 2 && (strings.HasPrefix(c, w) || strings.HasPrefix(w, c) && len(c) >= 3) {
			return c
		}
		if d := editDistance(w, c); d <= bestD && (best == "" || d < editDistance(w, best)) {
			best = c
		}
	}
	return best
}

// editDistance is the Levenshtein distance between a and b, in bytes.
func editDistance(a, b string) int {
	prev := make([]int, len(b)+1)
	cur := make([]int, len(b)+1)
	for j := range prev {
		prev[j] = j
	}
	for i := 1; i <= len(a); i++ {
		cur[0] = i
		for j := 1; j <= len(b); j++ {
			cost := 1
			if a[i-1] == b[j-1] {
				cost = 0
			}
			cur[j] = min(prev[j]+1, cur[j-1]+1, prev[j-1]+cost)
		}
		prev, cur = cur, prev
	}
	return prev[len(b)]
}

// usageError is a command-line mistake found after the flags were parsed:
// run prints it after the verb's name and exits with status 2.
func usageError(format string, args ...any) error {
	return usageErr(fmt.Sprintf(format, args...))
}

// usageErr is the error usageError returns: its message alone, matching
// errUsage for errors.Is.
type usageErr string

func (e usageErr) Error() string        { return string(e) }
func (e usageErr) Is(target error) bool { return target == errUsage }

// fnum formats a number for a report: six significant digits, no "-0". A
// number that six digits would round to ±1 but is not ±1 (an eigenvalue of
// 0.99999978) gets the digits that show how far from 1 it is: "1" is
// printed only for 1.
func fnum(x float64) string {
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
