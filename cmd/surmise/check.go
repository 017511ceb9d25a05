package main

import (
	"context"
	"encoding/json"
	"errors"
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
file is invalid, 2 for a usage error.

--json prints the same report as one JSON object, for scripts. Its keys:
"plant" and "file"; "fingerprint" (the model's sha256); "model" (sample
period "sample_seconds", "discretisation", the states, inputs and outputs with
their units and nominal values, and the discrete matrices "A", "B", "C", "D"
as arrays of rows); "eigenvalues" (each with "re", "im", "abs", "kind" and
"time_constant_seconds", null for a mode that does not decay);
"observability" ("prediction" and "current", each with "rank", "observable",
"detectable" and per mode "sigma_min", the scaled smallest singular value, 0
when unseen); "wiring" (one entry per signal: subject, unit, range, maximum
age); "noise"; "settings"; "gains" (null without a gains file; else its
"active" and "candidate" names, "errors", and per set its form, provenance
and, per output pattern, the error-dynamics "poles", "spectral_radius" and
"convergence_seconds", the slowest error mode's time constant); "can_run"
(true or false, as the exit status says); "problems" and "notes" (the
sentences that end the text report). Numbers are rounded to ten significant
digits.`

func runCheck(_ context.Context, e *env, args []string) error {
	fs := newFlags(e, "check", checkSynopsis)
	asJSON := fs.Bool("json", false, "print the report as one JSON object (its keys are listed above)")
	pos, err := parseArgs(fs, args)
	if err != nil {
		return err
	}
	if len(pos) < 1 || len(pos) > 2 {
		return usageError("want a plant file and at most one gains file, got %d arguments", len(pos))
	}
	plant, err := config.LoadPlant(pos[0])
	if err != nil {
		// Problems in the file are one "file:line:column: field: message"
		// per line, printed as they are; anything else (a file that cannot
		// be read) is said in the command's name.
		if _, inFile := errors.AsType[*config.ErrorList](err); inFile {
			fmt.Fprintln(e.stderr, err)
			return &exitError{code: 1}
		}
		return err
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
