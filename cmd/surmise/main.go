// Command surmise runs and commissions state estimators for process plants.
//
// Each sub-command is a thin function over the estimator, config and daemon
// packages; run `surmise help` for the list.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"strconv"
	"strings"
	"syscall"
)

// verb is one sub-command: its name, a one-line summary and the function that
// runs it with the remaining arguments.
type verb struct {
	name    string
	summary string
	run     func(ctx context.Context, env *env, args []string) error
}

// env is what a sub-command may touch of the outside world, so that tests can
// run verbs in-process with their own streams.
type env struct {
	stdout, stderr io.Writer
}

func verbs() []verb {
	return []verb{
		{"check", "report on a plant's model, its observability and its gain sets", runCheck},
		{"ctl", "ask a running daemon for status, load gains, promote, roll back, reset", runCtl},
		{"fleet", "put, list, show and remove the plants of a fleet in its JetStream bucket", runFleet},
		{"demo", "run the whole tool on an invented pilot plant, with no other service", runDemo},
		{"design", "design observer or Kalman gains and write the gains file", runDesign},
		{"noise", "estimate the process and measurement noise from a recording (autocovariance least squares)", runNoise},
		{"record", "write bus traffic to a recording file (or a JetStream stream) for replay", runRecord},
		{"replay", "run the tick engine on a recording and compare gain sets", runReplay},
		{"run", "run the estimators of plant files on the NATS bus (the daemon)", runRun},
		{"simulate", "publish a simulated plant's signals and true states, with scripted events", runSimulate},
		{"version", "print the version and build information", runVersion},
	}
}

// errUsage marks an error caused by the command line; main prints the usage
// and exits with status 2.
var errUsage = errors.New("usage")

// exitError carries a chosen exit status (for example `check` reports a plant
// that cannot be estimated with status 1 without it being a failure of the tool).
type exitError struct {
	code int
	msg  string
}

func (e *exitError) Error() string { return e.msg }

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	code := run(ctx, &env{stdout: os.Stdout, stderr: os.Stderr}, os.Args[1:])
	stop()
	os.Exit(code)
}

// run dispatches to a verb and turns its error into an exit status.
func run(ctx context.Context, e *env, args []string) int {
	if len(args) == 0 {
		usage(e.stderr)
		return 2
	}
	if args[0] == "-h" || args[0] == "--help" || args[0] == "-help" {
		usage(e.stdout)
		return 0
	}
	if args[0] == "help" {
		switch {
		case len(args) == 1:
			usage(e.stdout)
			return 0
		case len(args) > 2:
			fmt.Fprintf(e.stderr, "surmise help: want at most one command, got %q\n", args[1:])
			return 2
		}
		// `surmise help VERB` is `surmise VERB -h`.
		args = []string{args[1], "-h"}
	}
	if args[0] == "--version" || args[0] == "-version" {
		args = []string{"version"}
	}
	for _, v := range verbs() {
		if v.name != args[0] {
			continue
		}
		err := v.run(ctx, e, args[1:])
		var ee *exitError
		switch {
		case err == nil:
			return 0
		case errors.Is(err, flag.ErrHelp):
			return 0
		case errors.Is(err, errUsage):
			fmt.Fprintf(e.stderr, "surmise %s: %v\nRun 'surmise %s -h' for its usage and flags.\n", v.name, err, v.name)
			return 2
		case errors.As(err, &ee):
			if ee.msg != "" {
				fmt.Fprintf(e.stderr, "surmise %s: %s\n", v.name, ee.msg)
			}
			return ee.code
		default:
			fmt.Fprintf(e.stderr, "surmise %s: %v\n", v.name, err)
			return 1
		}
	}
	fmt.Fprintf(e.stderr, "surmise: unknown command %q", args[0])
	var names []string
	for _, v := range verbs() {
		names = append(names, v.name)
	}
	if s := closest(args[0], names); s != "" {
		fmt.Fprintf(e.stderr, " (did you mean %q?)", s)
	}
	fmt.Fprintln(e.stderr, "\nRun 'surmise help' for the list of commands.")
	return 2
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "surmise estimates the unmeasured states of a plant and runs beside it on NATS.")
	fmt.Fprintln(w, "\nUsage: surmise <command> [flags] [arguments]\n\nCommands:")
	for _, v := range verbs() {
		fmt.Fprintf(w, "  %-10s %s\n", v.name, v.summary)
	}
	fmt.Fprintln(w, "\nRun 'surmise help <command>' (or 'surmise <command> -h') for the usage and flags of a command.")
}

// newFlags returns a flag set for a verb that reports errors instead of
// exiting. Help (-h, --help, `surmise help VERB`) goes to the verb's stdout;
// a bad flag is reported by parseArgs in one line with a suggestion, not with
// the whole usage.
func newFlags(e *env, name, synopsis string) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	fs.Usage = func() { printHelp(e.stdout, fs, synopsis) }
	return fs
}

// printHelp writes a verb's usage line, its description and its flags, each
// flag as "--name PLACEHOLDER" with its default when it has one that is not
// the zero value.
func printHelp(w io.Writer, fs *flag.FlagSet, synopsis string) {
	fmt.Fprintln(w, strings.TrimSpace("Usage: surmise "+fs.Name()+" "+synopsis))
	n := 0
	fs.VisitAll(func(*flag.Flag) { n++ })
	if n == 0 {
		return
	}
	fmt.Fprintln(w, "\nFlags:")
	fs.VisitAll(func(f *flag.Flag) {
		placeholder, text := flag.UnquoteUsage(f)
		line := "  --" + f.Name
		if len(f.Name) == 1 {
			line = "  -" + f.Name
		}
		if placeholder != "" {
			line += " " + placeholder
		}
		fmt.Fprintln(w, line)
		if def := shownDefault(f); def != "" {
			text += " (default " + def + ")"
		}
		fmt.Fprintf(w, "      %s\n", strings.ReplaceAll(text, "\n", "\n      "))
	})
}

// shownDefault is a flag's default as help shows it: "" for a zero value
// (false, 0, "", 0s), which help leaves out.
func shownDefault(f *flag.Flag) string {
	switch f.DefValue {
	case "", "false", "0", "0s", "[]":
		return ""
	}
	if g, ok := f.Value.(flag.Getter); ok {
		if _, ok := g.Get().(string); ok {
			return strconv.Quote(f.DefValue)
		}
	}
	return f.DefValue
}
