package main

import (
	"bufio"
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
	"surmise/daemon/report"
)

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
			h = append(h, config.TruthColumn(stateName(plant, i)))
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
		if s.NISTicks == 0 {
			fmt.Fprintf(w, "  NIS         none: this gain set has no innovation covariance S, so no NIS and no outlier gate\n")
		} else {
			fmt.Fprintf(w, "  NIS         mean %s over %d ticks (%s outputs on average), %.1f %% inside the 95 %% band; outliers rejected %d\n",
				fnum(s.MeanNIS), s.NISTicks, fnum(s.MeanDof), 100*s.NISInBand, s.Outliers)
		}
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
