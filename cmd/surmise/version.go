package main

import (
	"context"
	"fmt"
	"runtime/debug"
)

// version describes the binary from its build information: the module version,
// the VCS revision and whether the tree was modified.
func version() string {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "surmise (no build information)"
	}
	v := bi.Main.Version
	rev, modified := "", false
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.modified":
			modified = s.Value == "true"
		}
	}
	if rev != "" {
		if len(rev) > 12 {
			rev = rev[:12]
		}
		v += " " + rev
		if modified {
			v += "+modified"
		}
	}
	return fmt.Sprintf("surmise %s (%s)", v, bi.GoVersion)
}

func runVersion(_ context.Context, e *env, args []string) error {
	fs := newFlags(e, "version", "")
	rest, err := parseArgs(fs, args)
	if err != nil {
		return err
	}
	if len(rest) > 0 {
		return usageError("takes no arguments, got %q", rest)
	}
	fmt.Fprintln(e.stdout, version())
	return nil
}
