package main

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"time"

	"surmise/config"
	"surmise/daemon"
	"surmise/daemon/recording"
	"surmise/daemon/report"
	"surmise/estimator"
)

const replaySynopsis = `[flags] PLANT.yaml --data FILE

Runs the daemon's tick engine over a recording on virtual time: ticks at
t0 + k·Ts, and before each tick the samples received up to it, in the order
received — the same hold, staleness, use-once, gate and status rules as a
live run. t0 is --start, else: for a CSV the first row's time; for a bus
recording that holds the plant's own estimates the first estimate's time
(where the recorded daemon ticked); for other bus recordings half a period
after the samples' typical arrival. One engine per
gain set: each --gains FILE runs that file's active set (FILE:NAME runs the
set NAME); without --gains, the plant's gains file's active set and its
candidate.

--data is a historian CSV (a time column, one column per signal named as in
the plant file; each row's time is the sample's and its receive time) or a
bus recording written by 'surmise record' (JSON Lines; the receive time, and
the payload's own time when it has one). True states in the recording
(truth.<state> columns, or <publish>.truth.<state> subjects, as 'surmise
simulate' writes them) are compared with the estimates.

Prints a summary; --out-csv writes the estimates, one row per tick and gain
set; --report writes an HTML page that compares the gain sets. Issues in the
recording are printed with their lines (at most 100 unless --all-issues).`

// gainsList collects repeated --gains flags.
type gainsList []string

func (g *gainsList) String() string     { return strings.Join(*g, ",") }
func (g *gainsList) Set(s string) error { *g = append(*g, s); return nil }

type replayFlags struct {
	data, outCSV, reportPath string
	tz, timeColumn           string
	delimiter                string
	decimalComma             bool
	start, end               string
	allIssues                bool
	gains                    gainsList
}

func runReplay(_ context.Context, e *env, args []string) error {
	fs := newFlags(e, "replay", replaySynopsis)
	var f replayFlags
	fs.StringVar(&f.data, "data", "", "the recording: a historian CSV or a bus recording (`FILE`)")
	fs.Var(&f.gains, "gains", "gains `FILE` or FILE:SET to run (repeat for several; default: the plant's active and candidate sets)")
	fs.StringVar(&f.outCSV, "out-csv", "", "write the estimates to `FILE` as CSV")
	fs.StringVar(&f.reportPath, "report", "", "write the HTML report to `FILE`")
	fs.StringVar(&f.tz, "tz", "", "time `zone` of CSV times written without one, such as Europe/Berlin")
	fs.StringVar(&f.timeColumn, "time-column", "", "CSV time column `name` (default: the first column)")
	fs.StringVar(&f.delimiter, "delimiter", ",", "CSV field `delimiter`")
	fs.BoolVar(&f.decimalComma, "decimal-comma", false, "CSV numbers use a decimal comma (needs another --delimiter)")
	fs.StringVar(&f.start, "start", "", "`time` of the first tick, RFC 3339 (default: the first sample's receive time)")
	fs.StringVar(&f.end, "end", "", "`time` at or after which the last tick falls (default: the last sample's)")
	fs.BoolVar(&f.allIssues, "all-issues", false, "print every issue of the recording, not only the first 100")
	pos, err := parseArgs(fs, args)
	if err != nil {
		return err
	}
	if len(pos) != 1 {
		return usageError("want one plant file, got %d arguments", len(pos))
	}
	if f.data == "" {
		return usageError("--data FILE is required")
	}
	var start, end time.Time
	for _, tf := range []struct {
		flag, val string
		dst       *time.Time
	}{{"--start", f.start, &start}, {"--end", f.end, &end}} {
		if tf.val == "" {
			continue
		}
		t, err := time.Parse(time.RFC3339Nano, tf.val)
		if err != nil {
			return usageError("%s %q: want an RFC 3339 time such as 2026-01-05T08:00:00Z", tf.flag, tf.val)
		}
		*tf.dst = t
	}
	plant, err := config.LoadPlant(pos[0])
	if err != nil {
		return err
	}
	runs, err := replayGainSets(plant, f.gains)
	if err != nil {
		return err
	}
	src, err := readRecording(plant, &f)
	if err != nil {
		return err
	}
	printIssues(e, src.Name, src.Issues, f.allIssues)

	n, _, p := plant.Model.Dims()
	sets := make([]*estimator.Prepared, len(runs))
	for i, r := range runs {
		sets[i] = r.prep
	}
	in := &report.Input{Plant: plant.Name, Source: f.data}
	for i := 0; i < n; i++ {
		in.StateNames = append(in.StateNames, stateName(plant, i))
		in.StateUnits = append(in.StateUnits, stateUnit(plant, i))
	}
	for _, w := range plant.Outputs {
		in.OutputNames, in.OutputUnits = append(in.OutputNames, w.Signal), append(in.OutputUnits, w.Unit)
	}
	for _, r := range runs {
		in.Runs = append(in.Runs, report.Run{Gains: r.name, Form: r.prep.Form().String(), Fingerprint: r.fingerprint})
	}

	var csvOut *estimateCSV
	if f.outCSV != "" {
		csvOut, err = newEstimateCSV(f.outCSV, plant, src.TruthCursor())
		if err != nil {
			return err
		}
		defer csvOut.abort()
	}
	bar := newProgressBar(e.stderr)
	rows := make([]report.TickRow, len(runs))
	for i := range rows {
		rows[i] = report.TickRow{States: make([]float64, n), StateStd: make([]float64, n),
			Innovations: make([]float64, p), InnovationStd: make([]float64, p), Faults: make([]uint8, p)}
	}
	res, err := daemon.Replay(plant, sets, src, daemon.ReplayOptions{
		Start: start, End: end,
		Progress: func(done, total int) {
			if done == 0 {
				for i := range in.Runs {
					in.Runs[i].Ticks = report.NewTicks(n, p, total)
				}
			}
			bar.show(done, total)
		},
		Tick: func(set, k int, est *daemon.Estimate) {
			fillRow(&rows[set], est)
			in.Runs[set].Ticks.Append(&rows[set])
			if csvOut != nil {
				csvOut.write(set == 0, runs[set].name, est)
			}
		},
	})
	bar.done()
	if err != nil {
		return err
	}
	if csvOut != nil {
		if err := csvOut.finish(); err != nil {
			return fmt.Errorf("writing %s: %w", f.outCSV, err)
		}
	}
	in.Truth = res.Truth
	printIssues(e, src.Name, res.Issues[len(src.Issues):], f.allIssues)
	sums := report.Summarise(in)
	placed := "given by --start"
	if start.IsZero() {
		_, placed = src.FirstTick(plant)
	}
	writeReplaySummary(e.stdout, plant, src, res, in, sums, placed)
	if csvOut != nil {
		fmt.Fprintf(e.stdout, "wrote %s (%d rows)\n", f.outCSV, csvOut.rows)
	}
	if f.reportPath != "" {
		var buf bytes.Buffer
		if err := report.WriteHTML(&buf, in); err != nil {
			return err
		}
		if err := writeAtomic(f.reportPath, buf.Bytes()); err != nil {
			return err
		}
		fmt.Fprintf(e.stdout, "wrote %s\n", f.reportPath)
	}
	return nil
}

// replayRun is one gain set to replay.
type replayRun struct {
	name, fingerprint string
	prep              *estimator.Prepared
}

// replayGainSets resolves the --gains flags to prepared gain sets.
func replayGainSets(plant *config.Plant, flags []string) ([]replayRun, error) {
	load := func(path string) (*config.GainsFile, error) {
		g, err := config.LoadGains(path, plant)
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("the gains file %s does not exist; write it with: surmise design %s", path, plant.Path)
		}
		return g, err
	}
	var runs []replayRun
	add := func(g *config.GainsFile, set, label string) error {
		ns := g.Set(set)
		if ns == nil {
			return fmt.Errorf("%s has no gain set %q", label, set)
		}
		prep, err := estimator.Prepare(plant.Model, ns.Set, plant.Gate)
		if err != nil {
			return fmt.Errorf("%s: gain set %s: %w", label, set, err)
		}
		name := set
		for _, r := range runs {
			if r.name == name {
				name = set + " (" + label + ")"
			}
		}
		runs = append(runs, replayRun{name: name, fingerprint: g.Fingerprint, prep: prep})
		return nil
	}
	if len(flags) == 0 {
		g, err := load(plant.GainsPath)
		if err != nil {
			return nil, err
		}
		if err := add(g, g.Active, plant.GainsPath); err != nil {
			return nil, err
		}
		if g.Candidate != "" {
			if err := add(g, g.Candidate, plant.GainsPath); err != nil {
				return nil, err
			}
		}
		return runs, nil
	}
	for _, fl := range flags {
		path, set := fl, ""
		if i := strings.LastIndexByte(fl, ':'); i > 0 {
			if _, err := os.Stat(fl); err != nil {
				path, set = fl[:i], fl[i+1:]
			}
		}
		g, err := load(path)
		if err != nil {
			return nil, err
		}
		if set == "" {
			set = g.Active
		}
		if err := add(g, set, path); err != nil {
			return nil, err
		}
	}
	return runs, nil
}

// readRecording reads --data, a CSV or a bus recording (told apart by the
// first character: a bus recording's lines are JSON objects).
func readRecording(plant *config.Plant, f *replayFlags) (*daemon.ReplaySource, error) {
	file, err := os.Open(f.data)
	if err != nil {
		return nil, err
	}
	defer file.Close()
	br := bufio.NewReaderSize(file, 1<<16)
	first := byte(0)
	for {
		b, err := br.Peek(1)
		if err != nil {
			break
		}
		if b[0] == ' ' || b[0] == '\n' || b[0] == '\r' || b[0] == '\t' {
			br.ReadByte()
			continue
		}
		first = b[0]
		break
	}
	if first == '{' {
		if f.tz != "" || f.timeColumn != "" || f.decimalComma || f.delimiter != "," {
			return nil, usageError("%s is a bus recording; --tz, --time-column, --delimiter and --decimal-comma are for CSV", f.data)
		}
		rec, err := recording.ReadJSONL(br, f.data)
		if err != nil {
			return nil, err
		}
		return daemon.NewBusSource(plant, rec), nil
	}
	opts := recording.CSVOptions{TimeColumn: f.timeColumn, Known: daemon.CSVColumns(plant), DecimalComma: f.decimalComma}
	if f.tz != "" {
		loc, err := time.LoadLocation(f.tz)
		if err != nil {
			return nil, usageError("--tz %q: %v", f.tz, err)
		}
		opts.Location = loc
	}
	if d := []rune(f.delimiter); len(d) != 1 {
		return nil, usageError("--delimiter %q: want one character", f.delimiter)
	} else {
		opts.Comma = d[0]
	}
	// ReadCSV sizes its buffers from the file: give it the file itself.
	if _, err := file.Seek(0, io.SeekStart); err != nil {
		return nil, err
	}
	rec, err := recording.ReadCSV(file, f.data, opts)
	if err != nil {
		return nil, err
	}
	return daemon.NewCSVSource(plant, rec), nil
}

// printIssues prints issues on stderr with their lines, at most 100 unless
// all.
func printIssues(e *env, name string, issues []recording.Issue, all bool) {
	const most = 100
	for i, is := range issues {
		if i == most && !all {
			fmt.Fprintf(e.stderr, "%s: %d more issues not shown (--all-issues shows them)\n", name, len(issues)-most)
			return
		}
		fmt.Fprintf(e.stderr, "%s:%s\n", name, strings.TrimPrefix(is.String(), "line "))
	}
}

func stateName(plant *config.Plant, i int) string {
	if s := plant.Model.States; i < len(s) && s[i].Name != "" {
		return s[i].Name
	}
	return "x" + strconv.Itoa(i+1)
}

func stateUnit(plant *config.Plant, i int) string {
	if s := plant.Model.States; i < len(s) {
		return s[i].Unit
	}
	return ""
}

// fillRow copies an estimate into a report row.
func fillRow(r *report.TickRow, est *daemon.Estimate) {
	r.Time = est.Time
	r.Status = est.Status.String()
	for i, s := range est.States {
		r.States[i], r.StateStd[i] = s.Value, s.Std
	}
	for j, o := range est.Outputs {
		r.Innovations[j], r.InnovationStd[j] = o.Innovation, o.InnovationStd
		var f uint8
		switch o.Bias {
		case 1:
			f |= report.FaultBiasHigh
		case -1:
			f |= report.FaultBiasLow
		}
		if o.Stuck {
			f |= report.FaultStuck
		}
		if o.LockedOut {
			f |= report.FaultLockedOut
		}
		r.Faults[j] = f
	}
	r.NIS, r.Dof = est.NIS, est.Dof
	r.NISMean, r.BandLo, r.BandHi = est.NISMean, est.NISBand[0], est.NISBand[1]
	r.Outliers = est.Outliers.Len()
}

// estimateCSV writes the estimates of a replay as CSV, one row per tick
// and gain set, to a temporary file renamed into place when complete.
type estimateCSV struct {
	path   string
	tmp    *os.File
	w      *bufio.Writer
	buf    []byte
	rows   int
	truth  *daemon.TruthCursor // nil without true states
	now    []float64           // the true states at the current tick
	hasNow bool
}

func newEstimateCSV(path string, plant *config.Plant, truth *daemon.TruthCursor) (*estimateCSV, error) {
	tmp, err := os.CreateTemp(filepath.Dir(path), ".surmise-replay-*.csv")
	if err != nil {
		return nil, err
	}
	if err := tmp.Chmod(0o644); err != nil { // CreateTemp makes it private
		tmp.Close()
		os.Remove(tmp.Name())
		return nil, err
	}
	n, _, _ := plant.Model.Dims()
	c := &estimateCSV{path: path, tmp: tmp, w: bufio.NewWriterSize(tmp, 1<<16), truth: truth, now: make([]float64, n)}
	h := []string{"time", "gains", "seq", "status"}
	for i := 0; i < n; i++ {
		h = append(h, stateName(plant, i), stateName(plant, i)+"_std")
	}
	for _, w := range plant.Outputs {
		h = append(h, w.Signal+"_measured", w.Signal+"_predicted", w.Signal+"_innovation")
	}
	h = append(h, "nis", "dof", "nis_mean", "outliers")
	if truth != nil {
		for i := 0; i < n; i++ {
			h = append(h, daemon.TruthColumn(stateName(plant, i)))
		}
	}
	c.w.WriteString(strings.Join(h, ",") + "\n")
	return c, nil
}

func appendNum(b []byte, v float64) []byte {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return b
	}
	return strconv.AppendFloat(b, v, 'g', -1, 64)
}

// write writes one tick of one gain set; first says it is the tick's first
// row (the true states are read once per tick).
func (c *estimateCSV) write(first bool, gains string, est *daemon.Estimate) {
	b := est.Time.UTC().AppendFormat(c.buf[:0], time.RFC3339Nano)
	b = append(b, ',')
	b = append(b, gains...)
	b = append(b, ',')
	b = strconv.AppendUint(b, est.Seq, 10)
	b = append(b, ',')
	b = append(b, est.Status.String()...)
	for _, s := range est.States {
		b = append(b, ',')
		b = appendNum(b, s.Value)
		b = append(b, ',')
		b = appendNum(b, s.Std)
	}
	for _, o := range est.Outputs {
		b = append(b, ',')
		b = appendNum(b, o.Measured)
		b = append(b, ',')
		b = appendNum(b, o.Predicted)
		b = append(b, ',')
		b = appendNum(b, o.Innovation)
	}
	b = append(b, ',')
	b = appendNum(b, est.NIS)
	b = append(b, ',')
	b = strconv.AppendInt(b, int64(est.Dof), 10)
	b = append(b, ',')
	b = appendNum(b, est.NISMean)
	b = append(b, ',')
	b = strconv.AppendInt(b, int64(est.Outliers.Len()), 10)
	if c.truth != nil {
		if first {
			c.truth.At(est.Time, c.now)
		}
		for _, v := range c.now {
			b = append(b, ',')
			b = appendNum(b, v)
		}
	}
	b = append(b, '\n')
	c.buf = b
	c.w.Write(b)
	c.rows++
}

// finish flushes and renames the file into place.
func (c *estimateCSV) finish() error {
	if err := c.w.Flush(); err != nil {
		return err
	}
	name := c.tmp.Name()
	if err := c.tmp.Close(); err != nil {
		return err
	}
	c.tmp = nil
	return os.Rename(name, c.path)
}

// abort removes the temporary file, if it is still there.
func (c *estimateCSV) abort() {
	if c.tmp != nil {
		name := c.tmp.Name()
		c.tmp.Close()
		os.Remove(name)
		c.tmp = nil
	}
}

// progressBar draws the progress of a long replay on stderr, when stderr is
// a terminal and the replay takes long enough to need one.
type progressBar struct {
	w     io.Writer
	on    bool
	start time.Time
	shown bool
	last  int
}

func newProgressBar(w io.Writer) *progressBar {
	f, ok := w.(*os.File)
	on := false
	if ok {
		if st, err := f.Stat(); err == nil && st.Mode()&os.ModeCharDevice != 0 && os.Getenv("TERM") != "dumb" {
			on = true
		}
	}
	return &progressBar{w: w, on: on, start: time.Now()}
}

func (b *progressBar) show(done, total int) {
	if !b.on || time.Since(b.start) < 500*time.Millisecond {
		return
	}
	pct := 100 * done / max(total, 1)
	if b.shown && pct == b.last {
		return
	}
	const width = 30
	fill := width * done / max(total, 1)
	fmt.Fprintf(b.w, "\rreplaying [%s%s] %3d %% (%d of %d ticks)", strings.Repeat("#", fill), strings.Repeat("-", width-fill), pct, done, total)
	b.shown, b.last = true, pct
}

func (b *progressBar) done() {
	if b.shown {
		fmt.Fprint(b.w, "\r\033[K")
	}
}

// writeReplaySummary prints what the replay did and the statistics of each
// gain set.
func writeReplaySummary(w io.Writer, plant *config.Plant, src *daemon.ReplaySource, res *daemon.ReplayResult, in *report.Input, sums []report.Summary, placed string) {
	ts := time.Duration(plant.Model.Ts * float64(time.Second))
	last := res.Start.Add(time.Duration(res.Ticks-1) * ts)
	fmt.Fprintf(w, "replayed %s on %s: %d ticks every %v, %s to %s, %d gain %s\n", plant.Name, src.Name, res.Ticks, ts,
		res.Start.UTC().Format(time.RFC3339Nano), last.UTC().Format(time.RFC3339Nano), len(sums), pluralWord(len(sums), "set", "sets"))
	fmt.Fprintf(w, "first tick: %s\n", placed)
	fmt.Fprintln(w, "samples")
	for i := range res.Signals {
		fmt.Fprintf(w, "  %s\n", res.Signals[i].String())
	}
	if len(res.Issues) > 0 {
		fmt.Fprintf(w, "issues: %d (on standard error, with their lines)\n", len(res.Issues))
	}
	for _, s := range sums {
		pct := func(k int) string { return fmt.Sprintf("%.1f %%", 100*float64(k)/float64(max(s.Ticks, 1))) }
		fmt.Fprintf(w, "%s (%s)\n", s.Gains, s.Form)
		fmt.Fprintf(w, "  status      tracking %s, coasting %s, stale-input %s, suspect %s\n", pct(s.Tracking), pct(s.Coasting), pct(s.StaleInput), pct(s.Suspect))
		fmt.Fprintf(w, "  NIS         mean %s over %d ticks (%s outputs on average), %.1f %% inside the 95 %% band; outliers rejected %d\n",
			fnum(s.MeanNIS), s.NISTicks, fnum(s.MeanDof), 100*s.NISInBand, s.Outliers)
		for _, o := range s.Outputs {
			white := "too few to test whiteness"
			if o.Autocorr != nil {
				white = "white"
				if !o.White {
					white = "not white"
				}
				white += fmt.Sprintf(" (Ljung–Box Q %s over %d lags, p %s)", fnum(o.LjungBox), report.Lags, fpval(o.P))
			}
			fmt.Fprintf(w, "  innovation  %-14s RMS %s %s, mean %s, %s\n", o.Name, fnum(o.RMS), o.Unit, fnum(o.Mean), white)
		}
		for _, o := range s.Outputs {
			writeFaults(w, o, s.Start)
		}
		for _, st := range s.States {
			if st.N == 0 {
				continue
			}
			cov := ""
			if st.CoverageN > 0 {
				cov = fmt.Sprintf(", within ±2σ on %.1f %% of ticks", 100*st.Coverage)
			}
			fmt.Fprintf(w, "  error       %-14s RMS %s %s against the true state%s\n", st.Name, fnum(st.RMS), st.Unit, cov)
		}
	}
}

// fpval formats a p-value, small ones in scientific notation.
func fpval(p float64) string {
	if p > 0 && p < 1e-3 {
		return strconv.FormatFloat(p, 'e', 1, 64)
	}
	return strconv.FormatFloat(p, 'f', 3, 64)
}

// writeFaults prints one line per output with the episodes of its sensor's
// fault indicators, and its drop-out share.
func writeFaults(w io.Writer, o report.OutputSummary, t0 time.Time) {
	var parts []string
	for _, e := range o.Faults {
		parts = append(parts, fmt.Sprintf("%s %v–%v", report.FaultName(e.Kind), e.Start.Sub(t0).Round(time.Second), e.End.Sub(t0).Round(time.Second)))
	}
	what := "no fault indicated"
	if len(parts) > 0 {
		what = strings.Join(parts, "; ")
	}
	fmt.Fprintf(w, "  sensor      %-14s %s; no sample on %.1f %% of ticks\n", o.Name, what, 100*o.Dropout)
}

func pluralWord(n int, one, many string) string {
	if n == 1 {
		return one
	}
	return many
}
