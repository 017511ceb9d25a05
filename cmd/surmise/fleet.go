package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"text/tabwriter"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/config"
	"surmise/daemon"
	"surmise/daemon/check"
)

const fleetSynopsis = `put|ls|get|rm --fleet NAME [flags] [args]

Keeps the plant and gains files of a fleet in its JetStream key-value bucket,
from which the daemons of 'surmise run --fleet NAME' take their estimators:

  put PLANT.yaml [GAINS.yaml]  check the plant and its gains file exactly as
                               'surmise check' does, and store both; a plant
                               that cannot run is refused (status 1). The
                               gains file is the plant's own unless given.
                               Putting new gains for a plant changes only the
                               gains, which the owning daemon checks and
                               swaps in (or refuses, keeping its set).
  ls                           every estimator: plant and gains revisions, the
                               daemon that owns it, its last status
  get NAME [--gains|--history] the stored plant file (or gains file, or the
                               revisions of both: the audit of changes)
  rm NAME                      remove it: its owner stops it

Exit status: 0 done, 1 refused or failed, 2 usage.`

// fleetFlags are the flags of `surmise fleet`.
type fleetFlags struct {
	fleet          string
	bus            natsFlags
	timeout        time.Duration
	json           bool
	gains, history bool
}

func runFleet(ctx context.Context, e *env, args []string) error {
	flags := newFlags(e, "fleet", fleetSynopsis)
	var f fleetFlags
	flags.StringVar(&f.fleet, "fleet", "", "the fleet's `NAME` (required)")
	f.bus.register(flags, "NATS server `URL`s, comma-separated (default: this user's local daemon, else nats://127.0.0.1:4222)")
	flags.DurationVar(&f.timeout, "timeout", 10*time.Second, "how long to wait for the server (a `DURATION` such as 10s)")
	flags.BoolVar(&f.json, "json", false, "ls, get --history: print JSON")
	flags.BoolVar(&f.gains, "gains", false, "get: print the gains file instead of the plant file")
	flags.BoolVar(&f.history, "history", false, "get: print the revisions of the plant and gains files")
	pos, err := parseArgs(flags, args)
	if err != nil {
		return err
	}
	if len(pos) == 0 {
		return usageError("want a verb: put, ls, get or rm")
	}
	verb := pos[0]
	pos = pos[1:]
	if f.fleet == "" {
		return usageError("--fleet NAME is required")
	}
	if err := daemon.CheckFleetName(f.fleet); err != nil {
		return usageError("%v", err)
	}
	want := map[string]int{"put": -1, "ls": 0, "get": 1, "rm": 1}
	n, ok := want[verb]
	switch {
	case !ok:
		return usageError("unknown fleet verb %q: want put, ls, get or rm", verb)
	case verb == "put" && (len(pos) < 1 || len(pos) > 2):
		return usageError("put wants a plant file and at most one gains file")
	case n >= 0 && len(pos) != n:
		return usageError("%s wants %d argument(s), got %d", verb, n, len(pos))
	case (f.gains || f.history) && verb != "get", f.gains && f.history:
		return usageError("--gains and --history go with get, one at a time")
	}

	// Check before connecting: a refused file needs no server.
	var plant *config.Plant
	var plantData, gainsData []byte
	if verb == "put" {
		if plant, plantData, gainsData, err = fleetCheck(e, pos); err != nil {
			return err
		}
	}

	nc, err := f.bus.dial(f.timeout, nil, nats.Name("surmise fleet"), nats.NoReconnect())
	if err != nil {
		return err
	}
	defer nc.Close()
	ctx, cancel := context.WithTimeout(ctx, f.timeout)
	defer cancel()
	store, err := daemon.OpenFleet(ctx, nc, f.fleet, 0, 0)
	if err != nil {
		return &exitError{code: 1, msg: err.Error()}
	}
	fail := func(err error) error { return &exitError{code: 1, msg: err.Error()} }
	switch verb {
	case "put":
		pr, gr, err := store.Put(ctx, plant.Name, plantData, gainsData)
		if err != nil {
			return fail(err)
		}
		fmt.Fprintf(e.stdout, "put %s in fleet %s: plant revision %d, gains revision %d\n", plant.Name, f.fleet, pr, gr)
	case "ls":
		return fleetList(ctx, e, store, f.json)
	case "get":
		if f.history {
			h, err := store.History(ctx, pos[0])
			if err != nil {
				return fail(err)
			}
			if f.json {
				return json.NewEncoder(e.stdout).Encode(h)
			}
			for _, c := range h {
				fmt.Fprintf(e.stdout, "%d\t%s\t%s\t%s\t%d bytes\n", c.Revision, c.Time.UTC().Format(time.RFC3339), c.Op, c.Key, c.Size)
			}
			return nil
		}
		files, ok, err := store.Get(ctx, pos[0])
		if err != nil {
			return fail(err)
		}
		if !ok {
			return fail(fmt.Errorf("fleet %s: no estimator %s", f.fleet, pos[0]))
		}
		data := files.Plant
		if f.gains {
			data = files.Gains
		}
		_, err = e.stdout.Write(data)
		return err
	case "rm":
		if err := store.Remove(ctx, pos[0]); err != nil {
			return fail(err)
		}
		fmt.Fprintf(e.stdout, "removed %s from fleet %s\n", pos[0], f.fleet)
	}
	return nil
}

// fleetCheck reads and checks a plant file and its gains file as `surmise
// check` does, and returns the plant and the two files' contents.
func fleetCheck(e *env, pos []string) (*config.Plant, []byte, []byte, error) {
	plant, err := config.LoadPlant(pos[0])
	if err != nil {
		fmt.Fprintln(e.stderr, err)
		return nil, nil, nil, &exitError{code: 1, msg: pos[0] + ": refused"}
	}
	gainsPath := plant.GainsPath
	if len(pos) == 2 {
		gainsPath = pos[1]
	}
	rep := check.Build(plant, gainsPath, true)
	if !rep.CanRun {
		check.WriteText(e.stderr, rep)
		return nil, nil, nil, &exitError{code: 1, msg: fmt.Sprintf("%s: refused: it cannot run (the report above says why)", pos[0])}
	}
	plantData, err := os.ReadFile(pos[0])
	if err != nil {
		return nil, nil, nil, err
	}
	gainsData, err := os.ReadFile(gainsPath)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, nil, nil, &exitError{code: 1, msg: fmt.Sprintf("%s: the gains file %s does not exist; write it with: surmise design %s", pos[0], gainsPath, pos[0])}
	}
	if err != nil {
		return nil, nil, nil, err
	}
	return plant, plantData, gainsData, nil
}

// fleetEntry is one line of `surmise fleet ls`.
type fleetEntry struct {
	Estimator     string    `json:"estimator"`
	PlantRevision uint64    `json:"plant_revision"`
	GainsRevision uint64    `json:"gains_revision"`
	Updated       time.Time `json:"updated"`
	Owner         string    `json:"owner"`  // the owning daemon's instance; "" when none
	Status        string    `json:"status"` // of the latest checkpoint; "" before one
	Checkpoint    time.Time `json:"checkpoint,omitzero"`
}

func fleetList(ctx context.Context, e *env, store *daemon.FleetStore, asJSON bool) error {
	names, err := store.Names(ctx)
	if err != nil {
		return &exitError{code: 1, msg: err.Error()}
	}
	entries := []fleetEntry{}
	for _, name := range names {
		files, ok, err := store.Get(ctx, name)
		if err != nil || !ok {
			continue // removed meanwhile
		}
		en := fleetEntry{Estimator: name, PlantRevision: files.PlantRev, GainsRevision: files.GainsRev, Updated: files.Updated}
		if o, ok, err := store.Owner(ctx, name); err == nil && ok {
			en.Owner = o.Instance
		}
		if cp, err := store.Checkpoint(ctx, name); err == nil && cp != nil {
			en.Status, en.Checkpoint = cp.Status, cp.Time
		}
		entries = append(entries, en)
	}
	if asJSON {
		enc := json.NewEncoder(e.stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(entries)
	}
	w := tabwriter.NewWriter(e.stdout, 0, 4, 2, ' ', 0)
	fmt.Fprintln(w, "ESTIMATOR\tPLANT REV\tGAINS REV\tOWNER\tSTATUS\tCHECKPOINT")
	for _, en := range entries {
		owner, status, cp := en.Owner, en.Status, "-"
		if owner == "" {
			owner = "(none)"
		}
		if status == "" {
			status = "-"
		}
		if !en.Checkpoint.IsZero() {
			cp = time.Since(en.Checkpoint).Round(time.Second).String() + " ago"
		}
		fmt.Fprintf(w, "%s\t%d\t%d\t%s\t%s\t%s\n", en.Estimator, en.PlantRevision, en.GainsRevision, owner, status, cp)
	}
	return w.Flush()
}
