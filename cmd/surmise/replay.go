package main

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
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
	fs.StringVar(&f.data, "data", "", "the recording `FILE`: a historian CSV or a bus recording")
	fs.Var(&f.gains, "gains", "gains `FILE` or FILE:SET to run (repeat for several; default: the plant's active and candidate sets)")
	fs.StringVar(&f.outCSV, "out-csv", "", "write the estimates to `FILE` as CSV")
	fs.StringVar(&f.reportPath, "report", "", "write the HTML report to `FILE`")
	csvFlags(fs, &f)
	fs.StringVar(&f.start, "start", "", "`TIME` of the first tick, RFC 3339 (default: chosen from the recording as described above)")
	fs.StringVar(&f.end, "end", "", "`TIME` at or after which the last tick falls, RFC 3339 (default: the last sample's)")
	fs.BoolVar(&f.allIssues, "all-issues", false, "print every issue of the recording, not only the first 100")
	plantPath, err := parsePlantAndData(fs, args, &f)
	if err != nil {
		return err
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
	plant, err := config.LoadPlant(plantPath)
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

// parsePlantAndData parses the arguments of a verb that reads one plant
// file and a recording (replay, noise): one positional plant file, and
// --data required. It returns the plant file's path.
func parsePlantAndData(fs *flag.FlagSet, args []string, f *replayFlags) (string, error) {
	pos, err := parseArgs(fs, args)
	if err != nil {
		return "", err
	}
	if len(pos) != 1 {
		return "", usageError("want one plant file, got %d arguments", len(pos))
	}
	if f.data == "" {
		return "", usageError("--data FILE is required")
	}
	return pos[0], nil
}

// csvFlags registers the flags that say how to read a CSV recording.
func csvFlags(fs *flag.FlagSet, f *replayFlags) {
	fs.StringVar(&f.tz, "tz", "", "time `ZONE` of CSV times written without one, such as Europe/Berlin")
	fs.StringVar(&f.timeColumn, "time-column", "", "CSV time column `NAME` (default: the first column)")
	fs.StringVar(&f.delimiter, "delimiter", ",", "CSV field `DELIMITER`")
	fs.BoolVar(&f.decimalComma, "decimal-comma", false, "CSV numbers use a decimal comma (needs another --delimiter)")
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
