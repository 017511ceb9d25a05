package main

import (
	"flag"
	"fmt"
	"strings"

	"surmise/daemon/check"
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

// fnum formats a number for a report as check does: six significant digits,
// no "-0".
func fnum(x float64) string { return check.FormatNum(x) }

// fpole formats an eigenvalue as check does: "0.81" or "0.5+0.2i".
func fpole(c complex128) string { return check.FormatPole(c) }

// fpoles formats a list of eigenvalues as check does, each complex-conjugate
// pair once ("0.5±0.2i").
func fpoles(ps []complex128) string { return check.FormatPoles(ps) }

// orDash returns s, or "—" when s is empty.
func orDash(s string) string {
	if s == "" {
		return "—"
	}
	return s
}
