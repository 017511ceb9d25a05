package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"io/fs"
	"math"
	"math/cmplx"
	"os"
	"path/filepath"
	"runtime/debug"
	"strconv"
	"strings"
	"time"

	"surmise/config"
	"surmise/daemon/check"
	"surmise/estimator"
)

const designSynopsis = `[flags] plant.yaml

Designs a gain set for the plant's discrete model and writes the gains file
(by default the plant's own, key "gains"), with the set's provenance and the
model's fingerprint. Methods:

  kalman  the steady-state Kalman filter of the plant's noise (the default)
  poles   pole placement: --poles lists the error-dynamics eigenvalues, or
          --faster F makes them F times faster than the plant's own modes
          (the earlier spelling --method place is read as poles)

The file is written atomically (a temporary file beside it, then a rename).
Designing twice from the same inputs gives the same bytes: the time recorded
in the provenance comes from --time, else from the SOURCE_DATE_EPOCH
environment variable (seconds since 1970, the reproducible-builds
convention), else the clock.`

// designFlags are the flags of `surmise design`.
type designFlags struct {
	method, form, poles, name, out, when string
	faster                               float64
	patterns, add, candidate             bool
}

func runDesign(_ context.Context, e *env, args []string) error {
	flags := newFlags(e, "design", designSynopsis)
	var f designFlags
	flags.StringVar(&f.method, "method", "", "`METHOD`: kalman or poles (pole placement; default kalman, or poles when --poles or --faster is given)")
	flags.StringVar(&f.form, "form", "current", "observer `FORM`: prediction (x̂(k+1|k)) or current (x̂(k|k))")
	flags.StringVar(&f.poles, "poles", "", "placement: the error-dynamics eigenvalues (`LIST`), comma-separated, real or complex pairs: \"0.8,0.8,0.7+0.1i,0.7-0.1i\" (0.7±0.1i stands for the pair)")
	flags.Float64Var(&f.faster, "faster", 0, "placement by rule of thumb: observer poles `F` times faster than the plant's own modes")
	flags.BoolVar(&f.patterns, "patterns", false, "also design a gain for every subset of the outputs that can be estimated from (so a missing sensor still corrects)")
	flags.StringVar(&f.name, "name", "", "the gain set's `NAME` (default: METHOD-FORM, such as kalman-current)")
	flags.BoolVar(&f.add, "add", false, "add the set to the existing gains file, replacing a set of the same name, instead of rewriting the file")
	flags.BoolVar(&f.candidate, "candidate", false, "mark the set as the candidate (run in shadow) instead of the active set; needs --add")
	flags.StringVar(&f.out, "o", "", "write the gains file to `FILE` instead of the plant's gains path; - for standard output")
	flags.StringVar(&f.when, "time", "", "the design `TIME` recorded in the provenance, RFC 3339 (default: $SOURCE_DATE_EPOCH, else now)")
	pos, err := parseArgs(flags, args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one plant file, got %d arguments", len(pos))
	}
	form, method, err := f.check(flags)
	if err != nil {
		return err
	}
	created, err := designTime(f.when)
	if err != nil {
		return err
	}

	plant, err := config.LoadPlant(pos[0])
	if err != nil {
		fmt.Fprintln(e.stderr, err)
		return &exitError{code: 1}
	}
	md := plant.Model
	n, _, _ := md.Dims()

	// The design.
	prov := config.Provenance{Method: method, Created: created, Tool: toolVersion()}
	var set *estimator.GainSet
	switch method {
	case "poles":
		var poles []complex128
		if f.poles != "" {
			if poles, err = parsePoles(f.poles); err != nil {
				return err
			}
		} else {
			poles = estimator.RuleOfThumbPoles(md.A, f.faster)
			if poles == nil {
				return errors.New("the eigenvalues of A could not be computed, so --faster has nothing to go by")
			}
			prov.Factor = f.faster
			prov.Note = fmt.Sprintf("rule of thumb: poles %s times faster than the plant's own modes", fnum(f.faster))
		}
		if len(poles) != n {
			return fmt.Errorf("--poles lists %d poles, the model has %d states: give one per state", len(poles), n)
		}
		for _, pl := range poles {
			if cmplx.Abs(pl) >= 1 {
				return fmt.Errorf("pole %s has modulus %s: error dynamics need every pole strictly inside the unit circle, or the error does not decay", fpole(pl), fnum(cmplx.Abs(pl)))
			}
		}
		prov.Poles = poles
		set, err = estimator.DesignPlaced(md, form, poles, f.patterns)
	case "kalman":
		prov.Q, prov.R = md.Q, md.R
		prov.Note = "steady-state Kalman filter of the plant's noise covariances"
		set, err = estimator.DesignKalman(md, form, f.patterns)
	}
	if err != nil {
		return fmt.Errorf("%s: refused: %w", plant.Path, err)
	}
	set.Name = f.name
	if set.Name == "" {
		set.Name = method + "-" + form.String()
	}

	// The file.
	out := f.out
	if out == "" {
		out = plant.GainsPath
	}
	g := config.NewGainsFile(plant)
	if f.add {
		src := out
		if out == "-" {
			src = plant.GainsPath
		}
		old, err := config.LoadGains(src, plant)
		switch {
		case err == nil:
			g = old
		case errors.Is(err, fs.ErrNotExist) && !f.candidate:
			// Nothing to add to: the set is the first.
		case errors.Is(err, fs.ErrNotExist):
			return fmt.Errorf("--add --candidate: there is no gains file %s to add a candidate to", src)
		default:
			fmt.Fprintln(e.stderr, err)
			return fmt.Errorf("--add: the existing gains file %s is refused (above); rewrite it without --add", src)
		}
	}
	if err := place(g, config.NamedSet{Set: set, Provenance: prov}, f.candidate); err != nil {
		return err
	}
	data, err := config.EncodeGains(g)
	if err != nil {
		return err
	}
	// Read it back as run and check will: the file must be accepted.
	if _, err := config.ParseGains(out, data, plant); err != nil {
		return fmt.Errorf("the designed gains do not pass their own checks (a bug):\n%w", err)
	}

	report := e.stdout
	if out == "-" {
		report = e.stderr
		if _, err := e.stdout.Write(data); err != nil {
			return fmt.Errorf("write gains: %w", err)
		}
	} else if err := writeAtomic(out, data); err != nil {
		return err
	}
	writeDesignSummary(report, plant, g, set, prov, f.patterns, out)
	return nil
}

// check validates the flags that do not need the plant and settles the
// method.
func (f *designFlags) check(fs *flag.FlagSet) (estimator.Form, string, error) {
	form, ok := estimator.ParseForm(f.form)
	if !ok || form == estimator.Kalman {
		return 0, "", usageError("--form %q: want prediction or current (the time-varying Kalman filter needs no design: it runs on the plant's noise)", f.form)
	}
	set := map[string]bool{}
	fs.Visit(func(fl *flag.Flag) { set[fl.Name] = true })
	method := f.method
	if method == "" {
		method = "kalman"
		if set["poles"] || set["faster"] {
			method = "poles"
		}
	}
	if method == "place" {
		method = "poles" // the word earlier versions took
	}
	switch method {
	case "poles":
		if f.poles == "" && !set["faster"] {
			return 0, "", usageError("--method poles needs its poles: --poles \"p1,p2,…\" (one per state) or --faster F")
		}
		if f.poles != "" && set["faster"] {
			return 0, "", usageError("give --poles or --faster, not both")
		}
		if set["faster"] && (!(f.faster > 0) || math.IsInf(f.faster, 0)) {
			return 0, "", usageError("--faster %v: want a positive factor (2 to 5 is usual)", f.faster)
		}
	case "kalman":
		if set["poles"] || set["faster"] {
			return 0, "", usageError("--poles and --faster are for --method poles; a Kalman design takes its poles from the noise")
		}
	default:
		return 0, "", usageError("--method %q: want poles or kalman", method)
	}
	if f.candidate && !f.add {
		return 0, "", usageError("--candidate needs --add: a new gains file needs an active set")
	}
	return form, method, nil
}

// place puts the set into the gains file, replacing a set of the same name,
// and marks it active or candidate; the other role is kept.
func place(g *config.GainsFile, ns config.NamedSet, candidate bool) error {
	name := ns.Set.Name
	replaced := false
	for i := range g.Sets {
		if g.Sets[i].Set.Name == name {
			g.Sets[i] = ns
			replaced = true
		}
	}
	if !replaced {
		g.Sets = append(g.Sets, ns)
	}
	if candidate {
		if g.Active == name {
			return fmt.Errorf("%q is the active set: to replace it, leave out --candidate; to try a new design in shadow, give it another --name", name)
		}
		g.Candidate = name
		return nil
	}
	g.Active = name
	if g.Candidate == name {
		g.Candidate = ""
	}
	return nil
}

// parsePoles reads a comma-separated list of poles: "0.8", "0.7+0.1i", and
// "0.7±0.1i" (or "0.7+-0.1i") for a conjugate pair.
func parsePoles(s string) ([]complex128, error) {
	var out []complex128
	for _, item := range strings.Split(s, ",") {
		item = strings.TrimSpace(item)
		pair := false
		for _, pm := range []string{"±", "+-"} {
			if strings.Contains(item, pm) {
				item = strings.Replace(item, pm, "+", 1)
				pair = true
			}
		}
		c, err := strconv.ParseComplex(item, 128)
		if err != nil || cmplx.IsNaN(c) || cmplx.IsInf(c) {
			return nil, usageError("--poles: %q is not a pole: want numbers such as 0.8 or 0.7+0.1i, comma-separated", item)
		}
		out = append(out, c)
		if pair {
			if imag(c) == 0 {
				return nil, usageError("--poles: %q: a ± pair needs an imaginary part", item)
			}
			out = append(out, cmplx.Conj(c))
		}
	}
	return out, nil
}

// designTime is the time recorded in the provenance: the --time flag, else
// SOURCE_DATE_EPOCH, else now; in UTC, to the second unless --time gives
// more.
func designTime(flagValue string) (time.Time, error) {
	if flagValue != "" {
		t, err := time.Parse(time.RFC3339Nano, flagValue)
		if err != nil {
			return time.Time{}, usageError("--time %q: want an RFC 3339 time such as 2025-06-01T14:03:00Z", flagValue)
		}
		return t.UTC(), nil
	}
	if s, ok := os.LookupEnv("SOURCE_DATE_EPOCH"); ok && s != "" {
		sec, err := strconv.ParseInt(s, 10, 64)
		if err != nil {
			return time.Time{}, fmt.Errorf("SOURCE_DATE_EPOCH=%q: want whole seconds since 1970-01-01 UTC", s)
		}
		return time.Unix(sec, 0).UTC(), nil
	}
	return time.Now().UTC().Truncate(time.Second), nil
}

// toolVersion names the program in a set's provenance: "surmise" and the
// module version (with the VCS revision when the binary carries one).
func toolVersion() string {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "surmise"
	}
	v := "surmise " + bi.Main.Version
	for _, s := range bi.Settings {
		if s.Key == "vcs.revision" && len(s.Value) >= 12 {
			v += " " + s.Value[:12]
		}
	}
	return strings.TrimSpace(v)
}

// writeAtomic writes data to path through a temporary file in the same
// directory and a rename, so that a reader (a running daemon watching the
// file) sees the old file or the new one, never a part.
func writeAtomic(path string, data []byte) error {
	dir, base := filepath.Split(path)
	if dir == "" {
		dir = "."
	}
	tmp, err := os.CreateTemp(dir, "."+base+".tmp-*")
	if err != nil {
		return fmt.Errorf("write gains: %w", err)
	}
	done := false
	defer func() {
		if !done {
			tmp.Close()
			os.Remove(tmp.Name())
		}
	}()
	if _, err := tmp.Write(data); err != nil {
		return fmt.Errorf("write gains: %w", err)
	}
	if err := tmp.Chmod(0o644); err != nil {
		return fmt.Errorf("write gains: %w", err)
	}
	if err := tmp.Sync(); err != nil {
		return fmt.Errorf("write gains: %w", err)
	}
	if err := tmp.Close(); err != nil {
		return fmt.Errorf("write gains: %w", err)
	}
	if err := os.Rename(tmp.Name(), path); err != nil {
		os.Remove(tmp.Name())
		return fmt.Errorf("write gains: %w", err)
	}
	done = true
	return nil
}

// writeDesignSummary prints what was designed and where it went.
func writeDesignSummary(out io.Writer, plant *config.Plant, g *config.GainsFile, set *estimator.GainSet, prov config.Provenance, patterns bool, path string) {
	var buf bytes.Buffer
	md := plant.Model
	_, _, p := md.Dims()
	how := "steady-state Kalman gains for the plant's noise"
	if prov.Method == "poles" {
		how = "pole placement at " + fpoles(prov.Poles)
		if prov.Factor != 0 {
			how += fmt.Sprintf(" (%s× faster than the plant)", fnum(prov.Factor))
		}
	}
	fmt.Fprintf(&buf, "%s: %s form, %s\n", set.Name, set.Form, how)
	var pts []check.Dynamics
	covered := map[estimator.Pattern]bool{}
	for _, pg := range set.Gains {
		covered[pg.Outputs] = true
		pts = append(pts, check.NewDynamics(pg.Outputs, md.Outputs, pg.Poles, md.Ts, pg.S != nil))
	}
	check.WriteDynamics(&buf, "  ", pts)
	if patterns {
		var left []string
		for s := estimator.Pattern(1); s < estimator.FullPattern(p); s++ {
			if !covered[s] {
				left = append(left, strings.Join(check.PatternNames(s, md.Outputs), "+"))
			}
		}
		if len(left) > 0 {
			fmt.Fprintf(&buf, "  no gain for %s: the model cannot be estimated from those outputs alone; such ticks predict only\n", strings.Join(left, ", "))
		}
	}
	where := path
	if path == "-" {
		where = "standard output"
	}
	roles := "active " + g.Active
	if g.Candidate != "" {
		roles += ", candidate " + g.Candidate
	}
	fmt.Fprintf(&buf, "wrote %s (%s; %s)\n", where, fmt.Sprintf("%d %s", len(g.Sets), pluralWord(len(g.Sets), "gain set", "gain sets")), roles)
	fmt.Fprintln(&buf, check.Caution)
	out.Write(buf.Bytes())
}
