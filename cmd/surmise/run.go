package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"io/fs"
	"log/slog"
	"os"
	"os/signal"
	"strings"
	"syscall"
	"time"

	"surmise/config"
	"surmise/daemon"
)

const runSynopsis = `[flags] PLANT.yaml [PLANT.yaml …]
       surmise run --fleet NAME --nats URL [flags]

Runs one estimator per plant file on the NATS bus: samples arrive on the
subjects the plant file wires, one estimate per sample period leaves on
"<publish>.estimate" (by default surmise.<name>.estimate). Each plant's gains
file must exist and match its model: write it with 'surmise design'.

Without --nats the daemon starts its own NATS server in-process, listening on
127.0.0.1 (port --nats-port) so that other programs on this machine can
publish samples and read estimates. With --nats it connects to the servers
given, and reconnects by itself when they go away; estimates are not
published while disconnected (the estimator keeps ticking, coasting).

HTTP (--listen, by default http://127.0.0.1:9731): the live page at /, for a
browser (each estimator's status, estimates with their uncertainty,
innovations, NIS and gain sets, updated as they change); /metrics
(Prometheus); /healthz (the tick loop advances); /readyz (bus connected,
gains valid, first tick done, and at least one sample received).

Gains change without a restart: SIGHUP, or a change of a plant's gains file
(its directory is watched), reloads them; a candidate set named in the gains
file runs in shadow on "<publish>.shadow.estimate"; 'surmise ctl' promotes it,
rolls back, loads gains and resets the state over the bus. A changed plant
file is refused until a restart.

One daemon writes each estimator: before publishing, the daemon takes the
estimator's lease on the bus (a JetStream key-value entry, renewed every
few seconds). A second daemon for the same estimator refuses to start and
names the first; with --standby it waits, ticking but publishing nothing,
and takes over when the first stops or its lease lapses (about 6 s after it
died).

With --fleet NAME and no plant files it joins the fleet NAME: it runs its
share of the estimators stored with 'surmise fleet put', one daemon per
estimator (a lease in the fleet's bucket), takes over those of a daemon that
stops within about 8 s, and starts each from its owner's last checkpoint.

SIGINT or SIGTERM stops it after the tick in progress.`

// runFlags are the flags of `surmise run`. The names are fixed: the systemd
// unit and the Kubernetes manifests under deploy/ use them.
type runFlags struct {
	bus                 natsFlags
	natsPort            int
	listen              string
	logFormat, logLevel string
	stateDir            string
	standby             bool
	metrics             string
	fleet, instance     string
}

func runRun(ctx context.Context, e *env, args []string) error {
	flags := newFlags(e, "run", runSynopsis)
	var f runFlags
	f.bus.register(flags, "NATS server `URL`s, comma-separated (default: start an embedded server)")
	flags.IntVar(&f.natsPort, "nats-port", daemon.DefaultEmbeddedPort, "loopback `PORT` of the embedded server; the default falls back to a random free port when taken, -1 always picks one")
	flags.StringVar(&f.listen, "listen", daemon.DefaultHTTPAddr, "HTTP `ADDRESS` of the live page (/), /metrics, /healthz and /readyz")
	flags.StringVar(&f.logFormat, "log-format", "text", "log `FORMAT`: text or json (on standard error)")
	flags.StringVar(&f.logLevel, "log-level", "info", "log `LEVEL`: debug, info, warn or error")
	flags.BoolVar(&f.standby, "standby", false, "when another daemon runs an estimator of these plant files on the bus, wait and take over when it stops, instead of refusing to start")
	flags.StringVar(&f.stateDir, "state-dir", "", "`DIRECTORY` for the embedded server's JetStream store (default: a temporary one, removed at exit)")
	flags.StringVar(&f.metrics, "metrics", "full", "per-estimator metric `LEVEL`: full (every series) or summary (health only, for many estimators)")
	flags.StringVar(&f.fleet, "fleet", "", "join the fleet `NAME`: run its share of the estimators of its bucket instead of plant files")
	flags.StringVar(&f.instance, "instance", "", "`NAME` of this daemon in its estimates and its fleet (default host-pid)")
	pos, err := parseArgs(flags, args)
	if err != nil {
		return err
	}
	switch {
	case f.fleet == "" && len(pos) == 0:
		return usageError("want at least one plant file, or --fleet NAME")
	case f.fleet != "" && len(pos) > 0:
		return usageError("--fleet takes its plants from the fleet's bucket: no plant files")
	}
	explicit := map[string]bool{}
	flags.Visit(func(fl *flag.Flag) { explicit[fl.Name] = true })
	log, err := newLogger(e.stderr, f.logFormat, f.logLevel)
	if err != nil {
		return err
	}
	level, err := daemon.ParseMetricsLevel(f.metrics)
	if err != nil {
		return usageError("--metrics: %v", err)
	}
	if f.bus.url != "" && explicit["nats-port"] {
		return usageError("--nats-port is the embedded server's port; it cannot be combined with --nats")
	}
	if f.bus.url == "" && f.bus.credentials() {
		return usageError("--creds, --nkey, --user-file and the --tls-* flags are for a server given with --nats")
	}

	if f.instance == "" {
		f.instance = daemon.DefaultInstance()
	}
	var plants []daemon.PlantSpec
	var fleet *daemon.FleetOptions
	if f.fleet != "" {
		fleet = &daemon.FleetOptions{Name: f.fleet}
	} else if plants, err = loadPlants(e.stderr, pos); err != nil {
		return err
	}

	port := f.natsPort
	if !explicit["nats-port"] {
		port = 0 // the default port if free, else a random one
	}
	d, err := daemon.New(daemon.Options{
		Plants:       plants,
		Bus:          f.bus.busOptions(),
		EmbeddedPort: port,
		Listen:       f.listen,
		Logger:       log,
		StateDir:     f.stateDir,
		Standby:      f.standby,
		Metrics:      level,
		Fleet:        fleet,
		Instance:     f.instance,
		Started: func(ep daemon.Endpoints) {
			where := "connecting to " + daemon.RedactURL(ep.BusURL)
			if ep.Embedded {
				where = ep.BusURL + " (embedded server"
				if !explicit["nats-port"] && !strings.HasSuffix(ep.BusURL, fmt.Sprintf(":%d", daemon.DefaultEmbeddedPort)) {
					where += fmt.Sprintf("; port %d was taken, so a free one was picked", daemon.DefaultEmbeddedPort)
				}
				where += ")"
			}
			fmt.Fprintf(e.stdout, "bus:  %s\n", where)
			fmt.Fprintf(e.stdout, "http: http://%s/ (live page)  /metrics  /healthz  /readyz\n", ep.HTTPAddr)
			if fleet != nil {
				fmt.Fprintf(e.stdout, "fleet %s: instance %s\n", fleet.Name, f.instance)
			}
			for _, p := range plants {
				fmt.Fprintf(e.stdout, "estimator %s: every %v, gains %q, estimates on %s\n",
					p.Plant.Name, time.Duration(p.Plant.Model.Ts*float64(time.Second)), p.Gains.Active, daemon.EstimateSubject(p.Plant))
			}
		},
	})
	if err != nil {
		return err
	}
	return runWithReload(ctx, d)
}

// runWithReload runs d with SIGHUP wired to a reload of every estimator's
// plant and gains files (daemon.Reload). The signal is caught before the
// daemon starts, so that an early SIGHUP does not end the process.
func runWithReload(ctx context.Context, d *daemon.Daemon) error {
	hup := make(chan os.Signal, 1)
	signal.Notify(hup, syscall.SIGHUP)
	defer signal.Stop(hup)
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	go func() {
		for {
			select {
			case <-ctx.Done():
				return
			case <-hup:
				d.Reload(daemon.TriggerSignal)
			}
		}
	}()
	return d.Run(ctx)
}

// loadPlants reads every plant file and its gains file. A file that is
// refused is reported on stderr with its positions; the error returned then
// only says which file.
func loadPlants(stderr io.Writer, paths []string) ([]daemon.PlantSpec, error) {
	var specs []daemon.PlantSpec
	var bad []string
	for _, path := range paths {
		plant, err := config.LoadPlant(path)
		if err != nil {
			fmt.Fprintln(stderr, err)
			bad = append(bad, path)
			continue
		}
		gains, err := config.LoadGains(plant.GainsPath, plant)
		switch {
		case errors.Is(err, fs.ErrNotExist):
			fmt.Fprintf(stderr, "%s: the gains file %s does not exist; write it with: surmise design %s\n", path, plant.GainsPath, path)
			bad = append(bad, path)
			continue
		case err != nil:
			fmt.Fprintln(stderr, err)
			fmt.Fprintf(stderr, "%s: the gains file %s is refused (above); fix it, or write a new one with: surmise design %s\n", path, plant.GainsPath, path)
			bad = append(bad, path)
			continue
		}
		specs = append(specs, daemon.PlantSpec{Plant: plant, Gains: gains})
	}
	if len(bad) > 0 {
		return nil, &exitError{code: 1, msg: "not started: " + strings.Join(bad, ", ") + " refused"}
	}
	return specs, nil
}

// newLogger returns the daemon's logger on w.
func newLogger(w io.Writer, format, level string) (*slog.Logger, error) {
	var lv slog.Level
	if err := lv.UnmarshalText([]byte(level)); err != nil {
		return nil, usageError("--log-level %q: want debug, info, warn or error", level)
	}
	opts := &slog.HandlerOptions{Level: lv}
	switch format {
	case "text":
		return slog.New(slog.NewTextHandler(w, opts)), nil
	case "json":
		return slog.New(slog.NewJSONHandler(w, opts)), nil
	}
	return nil, usageError("--log-format %q: want text or json", format)
}
