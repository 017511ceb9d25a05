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
	if len(args) == 0 || args[0] == "help" || args[0] == "-h" || args[0] == "--help" {
		usage(e.stdout)
		if len(args) == 0 {
			return 2
		}
		return 0
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
			fmt.Fprintf(e.stderr, "surmise %s: %v\n", v.name, err)
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
	fmt.Fprintf(e.stderr, "surmise: unknown command %q\n\n", args[0])
	usage(e.stderr)
	return 2
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "surmise estimates the unmeasured states of a plant and runs beside it on NATS.")
	fmt.Fprintln(w, "\nUsage: surmise <command> [flags] [arguments]\n\nCommands:")
	for _, v := range verbs() {
		fmt.Fprintf(w, "  %-10s %s\n", v.name, v.summary)
	}
	fmt.Fprintln(w, "\nRun 'surmise <command> -h' for the flags of a command.")
}

// newFlags returns a flag set for a verb that reports errors instead of
// exiting, writing its help to the verb's stderr.
func newFlags(e *env, name, synopsis string) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	fs.Usage = func() {
		fmt.Fprintf(e.stderr, "Usage: surmise %s %s\n\nFlags:\n", name, synopsis)
		fs.PrintDefaults()
	}
	return fs
}
