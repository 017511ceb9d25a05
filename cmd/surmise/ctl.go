package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"math"
	"os"
	"os/user"
	"slices"
	"strconv"
	"strings"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"

	"surmise/daemon"
)

const ctlSynopsis = `[flags] ESTIMATOR VERB [FILE]

Talks to the control service of a running daemon (surmise run) over NATS,
on the subjects surmise.control.ESTIMATOR.VERB.

Verbs:
  status              the active, candidate and previous gain sets, the last
                      reload and why it was refused, the latest tick of both
                      lanes (status, windowed NIS and its band, states), the
                      minimum dwell time left and the latest audit entries
  load FILE           load a gains file (validated against the running model;
                      the active set swaps with the state carried over, the
                      candidate starts in shadow); --set NAME runs another set,
                      --candidate NAME another candidate, --no-candidate none.
                      The file on disk is not changed: a restart, SIGHUP or a
                      change of that file loads it again.
  promote             make the candidate active, keeping the active state
                      (keep-state: the estimate does not jump); with
                      --adopt-state take the candidate's own state: the first
                      call shows the jump and changes nothing, --yes applies it
  rollback            make the previous active set active again
  reset               restart the state at the operating point, or at
                      --state NAME=VALUE (repeat; others at the operating
                      point, each inside its range in the plant file) with
                      --std NAME=VALUE for every state: the first call shows
                      the jump and changes nothing, --yes applies it

Exit status: 0 done (or shown), 1 refused or no answer, 2 usage.`

// ctlList is a flag that may be repeated.
type ctlList []string

func (l *ctlList) String() string     { return strings.Join(*l, " ") }
func (l *ctlList) Set(v string) error { *l = append(*l, v); return nil }

// ctlFlags are the flags of `surmise ctl`.
type ctlFlags struct {
	bus            natsFlags
	timeout        time.Duration
	json           bool
	set, candidate string
	noCandidate    bool
	adopt, yes     bool
	state, std     ctlList
}

func runCtl(ctx context.Context, e *env, args []string) error {
	flags := newFlags(e, "ctl", ctlSynopsis)
	var f ctlFlags
	f.bus.register(flags, "NATS server `URL`s, comma-separated (default: the embedded servers of this user's local daemons, found by their access files, then "+nats.DefaultURL+")")
	flags.DurationVar(&f.timeout, "timeout", 5*time.Second, "how long to wait for the connection and for the reply, a `DURATION`")
	flags.BoolVar(&f.json, "json", false, "print the daemon's JSON reply as it came")
	flags.StringVar(&f.set, "set", "", "load: run the set `NAME` instead of the file's active set")
	flags.StringVar(&f.candidate, "candidate", "", "load: run the set `NAME` in shadow instead of the file's candidate")
	flags.BoolVar(&f.noCandidate, "no-candidate", false, "load: run no candidate")
	flags.BoolVar(&f.adopt, "adopt-state", false, "promote: take the candidate's state (the estimate jumps) instead of keeping the active state")
	flags.BoolVar(&f.yes, "yes", false, "promote --adopt-state, reset: apply it (without, the jump is shown and nothing changes)")
	flags.Var(&f.state, "state", "reset: `NAME=VALUE`, an absolute state value (repeat)")
	flags.Var(&f.std, "std", "reset: `NAME=VALUE`, a state's standard deviation (repeat, for every state)")
	pos, err := parseArgs(flags, args)
	if err != nil {
		return err
	}
	if len(pos) < 2 {
		return usageError("want an estimator and a verb (status, load, promote, rollback, reset)")
	}
	name, verb, rest := pos[0], pos[1], pos[2:]
	explicit := map[string]bool{}
	flags.Visit(func(fl *flag.Flag) { explicit[fl.Name] = true })
	allowed := map[string][]string{
		daemon.VerbStatus:   nil,
		daemon.VerbLoad:     {"set", "candidate", "no-candidate"},
		daemon.VerbPromote:  {"adopt-state", "yes"},
		daemon.VerbRollback: nil,
		daemon.VerbReset:    {"state", "std", "yes"},
	}
	own, known := allowed[verb]
	if !known {
		return usageError("unknown verb %q: want status, load, promote, rollback or reset", verb)
	}
	for _, fl := range []string{"set", "candidate", "no-candidate", "adopt-state", "yes", "state", "std"} {
		if explicit[fl] && !slices.Contains(own, fl) {
			return usageError("--%s does not go with %s", fl, verb)
		}
	}
	if f.yes && verb == daemon.VerbPromote && !f.adopt {
		return usageError("--yes confirms --adopt-state; a keep-state promotion needs no confirmation")
	}
	if f.noCandidate && f.candidate != "" {
		return usageError("--candidate and --no-candidate exclude each other")
	}
	wantFile := verb == daemon.VerbLoad
	switch {
	case wantFile && len(rest) != 1:
		return usageError("load wants one gains file")
	case !wantFile && len(rest) != 0:
		return usageError("%s takes no argument, got %q", verb, strings.Join(rest, " "))
	}

	msg := &nats.Msg{Subject: daemon.ControlSubject(name, verb), Header: nats.Header{}}
	msg.Header.Set(daemon.HeaderOperator, ctlOperator())
	switch verb {
	case daemon.VerbLoad:
		data, err := os.ReadFile(rest[0])
		if err != nil {
			return fmt.Errorf("reading the gains file: %w", err)
		}
		msg.Data = data
		msg.Header.Set(daemon.HeaderSource, rest[0])
		if f.set != "" {
			msg.Header.Set(daemon.HeaderSet, f.set)
		}
		switch {
		case f.noCandidate:
			msg.Header.Set(daemon.HeaderCandidate, daemon.NoCandidate)
		case f.candidate != "":
			msg.Header.Set(daemon.HeaderCandidate, f.candidate)
		}
	case daemon.VerbPromote:
		req := daemon.PromoteRequest{Transfer: daemon.KeepState}
		if f.adopt {
			req.Transfer, req.Confirm = daemon.AdoptState, f.yes
		}
		msg.Data, _ = json.Marshal(req)
	case daemon.VerbReset:
		req := daemon.ResetRequest{}
		if req.State, err = ctlNameValues("--state", f.state); err != nil {
			return err
		}
		if req.Std, err = ctlNameValues("--std", f.std); err != nil {
			return err
		}
		req.Confirm = f.yes
		msg.Data, _ = json.Marshal(req)
	}

	reply, err := ctlRequest(ctx, f, msg)
	if err != nil {
		return err
	}
	if code := reply.Header.Get(micro.ErrorCodeHeader); code != "" {
		var ce daemon.ControlError
		if json.Unmarshal(reply.Data, &ce) != nil || ce.Error == "" {
			ce = daemon.ControlError{Code: code, Error: reply.Header.Get(micro.ErrorHeader)}
		}
		if f.json {
			fmt.Fprintln(e.stdout, strings.TrimSpace(string(reply.Data)))
		}
		text := fmt.Sprintf("%s %s refused (%s): %s", name, verb, ce.Code, ce.Error)
		for _, d := range ce.Detail {
			text += "\n  " + d
		}
		return &exitError{code: 1, msg: text}
	}
	if f.json {
		fmt.Fprintln(e.stdout, strings.TrimSpace(string(reply.Data)))
		return nil
	}
	return ctlPrintReply(e.stdout, verb, reply.Data)
}

// ctlOperator is who `surmise ctl` says runs it, user@host; the daemon records
// it as claimed, unchecked.
func ctlOperator() string {
	name := os.Getenv("USER")
	if u, err := user.Current(); err == nil && u.Username != "" {
		name = u.Username
	}
	host, _ := os.Hostname()
	return name + "@" + host
}

// ctlNameValues parses NAME=VALUE arguments.
func ctlNameValues(flagName string, list []string) (map[string]float64, error) {
	if len(list) == 0 {
		return nil, nil
	}
	out := map[string]float64{}
	for _, kv := range list {
		k, v, ok := strings.Cut(kv, "=")
		if !ok || k == "" {
			return nil, usageError("%s %q: want NAME=VALUE", flagName, kv)
		}
		x, err := strconv.ParseFloat(v, 64)
		if err != nil || math.IsNaN(x) || math.IsInf(x, 0) {
			return nil, usageError("%s %q: %q is not a finite number", flagName, kv, v)
		}
		if _, dup := out[k]; dup {
			return nil, usageError("%s: %s given twice", flagName, k)
		}
		out[k] = x
	}
	return out, nil
}

// ctlRequest connects, sends the request and waits for the reply. Without
// --nats it asks each local daemon in turn until one answers for the
// estimator.
func ctlRequest(ctx context.Context, f ctlFlags, msg *nats.Msg) (*nats.Msg, error) {
	var reply *nats.Msg
	// The server refuses a publish it does not allow asynchronously: the
	// error handler hears it, and the request stops waiting.
	denied := make(chan error, 8)
	onError := nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) {
		select {
		case denied <- err:
		default:
		}
	})
	ask := func(nc *nats.Conn) error {
		rctx, cancel := context.WithTimeout(ctx, f.timeout)
		defer cancel()
		var refusal atomic.Pointer[error]
		go func() {
			select {
			case err := <-denied:
				refusal.Store(&err)
				cancel()
			case <-rctx.Done():
			}
		}()
		r, err := nc.RequestMsgWithContext(rctx, msg)
		if p := refusal.Load(); p != nil {
			err = *p
		}
		where := daemon.RedactURL(nc.ConnectedUrlRedacted())
		switch {
		case errors.Is(err, nats.ErrNoResponders):
			return fmt.Errorf("no daemon answers on %s at %s: %w", msg.Subject, where, errTryNext)
		case errors.Is(err, context.DeadlineExceeded):
			// Every daemon listens on surmise.control.*.<verb> and only
			// the one that runs the estimator answers: silence means
			// "not here".
			return fmt.Errorf("no reply on %s at %s within %v (a daemon answers only for the estimators it runs): %w", msg.Subject, where, f.timeout, errTryNext)
		case err != nil && strings.Contains(strings.ToLower(err.Error()), "permissions violation"):
			return &exitError{code: 1, msg: fmt.Sprintf("%s at %s: not allowed to call the control service: %v (log in with --creds, --nkey or --user-file)", msg.Subject, where, err)}
		case err != nil:
			return &exitError{code: 1, msg: fmt.Sprintf("%s at %s: %v", msg.Subject, where, err)}
		}
		reply = r
		return nil
	}
	nc, err := f.bus.dial(f.timeout, ask, nats.Name("surmise ctl"), nats.NoReconnect(), onError)
	if err != nil {
		var ee *exitError
		if errors.As(err, &ee) && strings.Contains(ee.msg, errTryNext.Error()) {
			ee.msg = strings.Replace(ee.msg, "cannot reach the bus", "no daemon answers", 1) + " (and is the estimator's name right?)"
		}
		return nil, err
	}
	nc.Close()
	return reply, nil
}
