package main

import (
	"bufio"
	"context"
	"errors"
	"flag"
	"fmt"
	"io/fs"
	"net"
	"net/url"
	"os"
	"slices"
	"strings"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/config"
	"surmise/daemon/recording"
	"surmise/daemon/simplant"
)

const simulateSynopsis = `[flags] PLANT.yaml

Runs the plant file's model as a simulated plant: publishes its inputs and
noisy measurements on their wired subjects, and its true hidden states on
"<publish>.truth.<state>", one sample per sample time, with the events of a
scenario (input steps and PRBS, a dropped-out sensor, a bias, spikes, a slow
sensor, jittered arrival). The payloads are {"value": v, "time": RFC 3339}.

--scenario is a scenario file or the name of a built-in one (rehearsal,
steady); --print-scenario writes the chosen scenario as a file to edit.

With --out or --csv nothing is published: the run is written at once, in
plant time from --start, as a bus recording (JSON Lines, what 'surmise record'
writes) or a historian-style CSV, for 'surmise replay'. The same seed,
scenario and start give the same file.

--speed scales time: 10 runs the plant ten times faster than real time. An
estimator only keeps up with a sped-up plant when it ticks at the same scale
('surmise demo --speed' does that); 'surmise run' ticks in real time.

Caution: the messages are invented, but look like a plant's measurements and
controller outputs. By default they go out under the subject prefix "sim."
(sim.pilot.hwl.tt110.pv), where nothing of the plant listens, and only to a
NATS server on this machine (a loopback address). To feed an estimator on
its wired subjects — a 'surmise run' of a copy of the plant file on this
machine, while commissioning — give --prefix ''. --remote allows a server on
another machine: never point it at a server that carries a running plant's
subjects, where interlocks, historians or controllers could take simulated
values for real ones.`

type simulateFlags struct {
	bus                       natsFlags
	scenario, out, csv, start string
	prefix                    string
	remote                    bool
	initial                   string
	seed                      uint64
	speed                     float64
	length                    time.Duration
	printScenario             bool
}

func runSimulate(ctx context.Context, e *env, args []string) error {
	fs := newFlags(e, "simulate", simulateSynopsis)
	var f simulateFlags
	f.bus.register(fs, "NATS server `URL`s to publish to, comma-separated (default: this user's newest local daemon, found by its access files, else "+nats.DefaultURL+")")
	fs.StringVar(&f.prefix, "prefix", "sim.", "put `PREFIX` before every published subject; '' publishes on the plant file's own subjects")
	fs.BoolVar(&f.remote, "remote", false, "allow a NATS server that is not on this machine (see the caution above)")
	fs.Uint64Var(&f.seed, "seed", 1, "`SEED` of the noise, the initial state, the PRBS phase and the jitter")
	fs.Float64Var(&f.speed, "speed", 1, "time `SCALE`: 1 is real time, 10 ten times faster")
	fs.StringVar(&f.scenario, "scenario", "rehearsal", "scenario `FILE`, or a built-in: "+strings.Join(simplant.BuiltinNames, ", "))
	fs.DurationVar(&f.length, "for", 0, "plant time to run, a `DURATION` such as 2m (default: until interrupted; with --out or --csv, the scenario's length)")
	fs.StringVar(&f.out, "out", "", "write a bus recording to `FILE` instead of publishing")
	fs.StringVar(&f.csv, "csv", "", "write a historian-style CSV to `FILE` instead of publishing")
	fs.StringVar(&f.start, "start", "", "`TIME` of the first sample for --out and --csv, RFC 3339 (default: now)")
	fs.BoolVar(&f.printScenario, "print-scenario", false, "print the scenario as a file and exit")
	fs.StringVar(&f.initial, "initial", "nominal", "true initial `STATE`: nominal (the plant file's initial state) or draw (a draw from its initial covariance around it)")
	pos, err := parseArgs(fs, args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one plant file, got %d arguments", len(pos))
	}
	explicit := map[string]bool{}
	fs.Visit(func(fl *flag.Flag) { explicit[fl.Name] = true })
	toFile := f.out != "" || f.csv != ""
	switch {
	case !(f.speed > 0) || f.speed > 1e6:
		return usageError("--speed %v: want a positive scale, at most 1e6", f.speed)
	case f.length < 0:
		return usageError("--for %v: want a positive duration", f.length)
	case toFile && explicit["speed"]:
		return usageError("--speed paces publishing; --out and --csv write plant time at once")
	case toFile && (explicit["nats"] || f.bus.credentials() || explicit["prefix"] || explicit["remote"]):
		return usageError("--out and --csv write a file; they publish nothing (--nats, --prefix and --remote are for publishing)")
	case f.prefix != "" && !validPrefix(f.prefix):
		return usageError("--prefix %q: want subject tokens ending in a dot, such as sim. or test.rig1.", f.prefix)

	case f.initial != "nominal" && f.initial != "draw":
		return usageError("--initial %q: want nominal or draw", f.initial)
	case f.start != "" && !toFile:
		return usageError("--start is the time of the first sample of --out or --csv; published samples carry the time they are sent")
	}
	if !toFile && !f.remote {
		if err := loopbackOnly(f.bus.url); f.bus.url != "" && err != nil {
			return usageError("%v", err)
		}
	}
	plant, err := config.LoadPlant(pos[0])
	if err != nil {
		return err
	}
	sc, err := loadScenario(f.scenario, plant)
	if err != nil {
		return err
	}
	if f.printScenario {
		_, err := e.stdout.Write(simplant.Format(sc))
		return err
	}
	if toFile {
		return simulateToFiles(e, plant, sc, &f)
	}
	sim, err := simplant.New(plant, sc, simplant.Options{Seed: f.seed, DrawInitial: f.initial == "draw"})
	if err != nil {
		return err
	}
	opts := []nats.Option{nats.Name("surmise-simulate"), nats.MaxReconnects(-1), nats.ReconnectBufSize(-1)}
	if !f.remote {
		// A loopback server's cluster may name peers on other machines:
		// reconnect only to the servers given.
		opts = append(opts, nats.IgnoreDiscoveredServers())
	}
	nc, err := f.bus.dial(5*time.Second, nil, opts...)
	if err != nil {
		return err
	}
	defer nc.Close()
	if !f.remote {
		// The server may have been found rather than given (a local
		// daemon's access file can name a server elsewhere): check the
		// one connected to as well.
		if err := loopbackOnly(nc.ConnectedUrl()); err != nil {
			return usageError("%v", err)
		}
	}
	describeSimulation(e, plant, sc, f.seed, f.speed, f.prefix)
	fmt.Fprintf(e.stdout, "publishing invented values to %s", nc.ConnectedUrlRedacted())
	if f.length > 0 {
		fmt.Fprintf(e.stdout, " for %v of plant time (Ctrl-C stops it sooner)\n", f.length)
	} else {
		fmt.Fprintln(e.stdout, " until interrupted (Ctrl-C)")
	}
	stats, err := simplant.Publish(ctx, nc, simplant.NewStream(sim), simplant.PublishOptions{
		Clock:  simplant.Clock{Speed: f.speed},
		For:    f.length,
		Prefix: f.prefix,
	})
	if ferr := nc.FlushTimeout(5 * time.Second); err == nil && ferr != nil && !errors.Is(ferr, nats.ErrConnectionClosed) {
		err = fmt.Errorf("flushing the last samples: %w", ferr)
	}
	fmt.Fprintf(e.stdout, "published %d samples: %d input, %d output and %d truth messages", stats.Samples,
		stats.Messages[simplant.Input], stats.Messages[simplant.Output], stats.Messages[simplant.Truth])
	if stats.Failed > 0 {
		fmt.Fprintf(e.stdout, "; %d refused while the connection was down", stats.Failed)
	}
	fmt.Fprintln(e.stdout)
	return err
}

// loadScenario reads the scenario named by the --scenario flag: a file if
// one exists by that name, else a built-in scenario.
func loadScenario(name string, plant *config.Plant) (*simplant.Scenario, error) {
	_, statErr := os.Stat(name)
	if statErr == nil || !slices.Contains(simplant.BuiltinNames, name) {
		sc, err := simplant.LoadScenario(name, plant)
		if errors.Is(err, fs.ErrNotExist) {
			return nil, usageError("--scenario %s: no such file, and not a built-in scenario (%s)", name, strings.Join(simplant.BuiltinNames, ", "))
		}
		return sc, err
	}
	return simplant.Builtin(name, plant)
}

// describeSimulation prints where the simulated plant's signals go.
func describeSimulation(e *env, plant *config.Plant, sc *simplant.Scenario, seed uint64, speed float64, prefix string) {
	name := sc.Name
	if name == "" {
		name = "(unnamed)"
	}
	repeat := ""
	if sc.Repeat {
		repeat = ", repeated"
	}
	fmt.Fprintf(e.stdout, "simulated plant %s: sample time %v, seed %d, speed %g, scenario %s (%v%s, %d events)\n",
		plant.Name, time.Duration(plant.Model.Ts*float64(time.Second)), seed, speed, name, sc.Length, repeat, len(sc.Events))
	for _, w := range plant.Inputs {
		fmt.Fprintf(e.stdout, "  input  %-14s %s%s\n", w.Signal, prefix, w.Subject)
	}
	for _, w := range plant.Outputs {
		fmt.Fprintf(e.stdout, "  output %-14s %s%s\n", w.Signal, prefix, w.Subject)
	}
	for _, s := range plant.Model.States {
		fmt.Fprintf(e.stdout, "  truth  %-14s %s%s\n", s.Name, prefix, plant.TruthSubject(s.Name))
	}
}

// simulateToFiles writes the run as a bus recording and/or a CSV.
func simulateToFiles(e *env, plant *config.Plant, sc *simplant.Scenario, f *simulateFlags) error {
	start := time.Now().UTC().Truncate(time.Second)
	if f.start != "" {
		t, err := time.Parse(time.RFC3339Nano, f.start)
		if err != nil {
			return usageError("--start %q: want an RFC 3339 time such as 2026-01-05T08:00:00Z", f.start)
		}
		start = t
	}
	length := f.length
	if length == 0 {
		length = sc.Length
	}
	clk := simplant.Clock{Start: start, Speed: 1}
	write := func(path string, fn func(w *bufio.Writer, sim *simplant.Sim) (simplant.Stats, error)) error {
		sim, err := simplant.New(plant, sc, simplant.Options{Seed: f.seed, DrawInitial: f.initial == "draw"})
		if err != nil {
			return err
		}
		file, err := os.Create(path)
		if err != nil {
			return err
		}
		w := bufio.NewWriterSize(file, 1<<16)
		stats, err := fn(w, sim)
		if err == nil {
			err = w.Flush()
		}
		if cerr := file.Close(); err == nil {
			err = cerr
		}
		if err != nil {
			return fmt.Errorf("writing %s: %w", path, err)
		}
		fmt.Fprintf(e.stdout, "wrote %s: %d samples of %s from %s (seed %d, scenario %s): %d input, %d output and %d truth values\n",
			path, stats.Samples, plant.Name, start.Format(time.RFC3339Nano), f.seed, orDash(sc.Name),
			stats.Messages[simplant.Input], stats.Messages[simplant.Output], stats.Messages[simplant.Truth])
		return nil
	}
	if f.out != "" {
		err := write(f.out, func(w *bufio.Writer, sim *simplant.Sim) (simplant.Stats, error) {
			// The buffered writer is flushed at the end, not per line: the
			// file is written at once, not by a recorder that may be killed.
			return simplant.WriteRecording(recording.NewWriter(noFlush{w}), simplant.NewStream(sim), clk, length)
		})
		if err != nil {
			return err
		}
	}
	if f.csv != "" {
		return write(f.csv, func(w *bufio.Writer, sim *simplant.Sim) (simplant.Stats, error) {
			return simplant.WriteCSV(w, sim, clk, length)
		})
	}
	return nil
}

// noFlush hides the Flush method of a writer from recording.Writer, which
// would otherwise flush after every line.
type noFlush struct{ w *bufio.Writer }

func (n noFlush) Write(p []byte) (int, error) { return n.w.Write(p) }

// validPrefix reports whether p is one or more subject tokens, each ending
// in a dot: no spaces, no wildcards, no empty token.
func validPrefix(p string) bool {
	if !strings.HasSuffix(p, ".") {
		return false
	}
	for _, tok := range strings.Split(strings.TrimSuffix(p, "."), ".") {
		if tok == "" || tok == "*" || tok == ">" || strings.ContainsAny(tok, " \t\r\n") {
			return false
		}
	}
	return true
}

// loopbackOnly returns an error unless every server of urls (comma-separated
// NATS URLs) is on this machine: localhost or a loopback address.
func loopbackOnly(urls string) error {
	for _, u := range strings.Split(urls, ",") {
		u = strings.TrimSpace(u)
		if !strings.Contains(u, "://") {
			u = "nats://" + u
		}
		parsed, err := url.Parse(u)
		if err != nil {
			return fmt.Errorf("--nats %q: %v", u, err)
		}
		host := parsed.Hostname()
		if host == "localhost" {
			continue
		}
		if ip := net.ParseIP(host); ip != nil && ip.IsLoopback() {
			continue
		}
		return fmt.Errorf("the NATS server %s is not on this machine: simulate publishes invented measurements, so it only talks to a loopback server unless --remote is given (read 'surmise simulate -h' first)", parsed.Redacted())
	}
	return nil
}
