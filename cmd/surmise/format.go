package main

import (
	"flag"
	"fmt"

	"surmise/daemon/check"
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
