package main

import (
	"context"
	"encoding/json"
	"fmt"

	"surmise/config"
	"surmise/daemon/check"
)

const checkSynopsis = `[--json] plant.yaml [gains.yaml]

Reports how the plant's model was discretised, its matrices, the eigenvalues of
A with their time constants, the observability of both observer forms, the
wiring and the noise, and, for a gains file, the error dynamics of every gain
set. Without a gains argument the plant's own gains file is read when it exists.

Exit status: 0 when an estimator can run on this model (detectable in the
forms the gain sets use, and every gain set valid; without a gains file, when
the model is detectable), 1 when it cannot (the reasons end the report) or a
file is invalid, 2 for a usage error.`

func runCheck(_ context.Context, e *env, args []string) error {
	fs := newFlags(e, "check", checkSynopsis)
	asJSON := fs.Bool("json", false, "print the report as JSON (its fields are documented in package surmise/daemon/check)")
	pos, err := parseArgs(fs, args)
	if err != nil {
		return err
	}
	if len(pos) < 1 || len(pos) > 2 {
		return usageError("want a plant file and at most one gains file, got %d arguments", len(pos))
	}
	plant, err := config.LoadPlant(pos[0])
	if err != nil {
		// Config errors are one "file:line:column: field: message" per line;
		// print them as they are.
		fmt.Fprintln(e.stderr, err)
		return &exitError{code: 1}
	}
	gainsPath, explicit := plant.GainsPath, false
	if len(pos) == 2 {
		gainsPath, explicit = pos[1], true
	}
	rep := check.Build(plant, gainsPath, explicit)
	if *asJSON {
		enc := json.NewEncoder(e.stdout)
		enc.SetIndent("", "  ")
		if err := enc.Encode(rep); err != nil {
			return fmt.Errorf("write report: %w", err)
		}
	} else {
		check.WriteText(e.stdout, rep)
	}
	if !rep.CanRun {
		return &exitError{code: 1}
	}
	return nil
}
