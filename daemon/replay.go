package daemon

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"sort"
	"strings"
	"time"

	"surmise/config"
	"surmise/daemon/recording"
	"surmise/estimator"
)

// ReplaySource is a recording prepared for Replay: the samples of the plant's
// wired signals in the order they were received, the true states when the
// recording has them, and every issue found in reading and preparing it.
// Build it with NewCSVSource or NewBusSource. A source serves one Replay at
// a time.
type ReplaySource struct {
	// Name is the recording's name, for messages.
	Name string
	// Issues are the reader's issues and those found preparing the
	// samples: payloads that do not decode, subjects or columns that are
	// not wired. Replay adds the samples the engine refuses.
	Issues []recording.Issue
	// Truth holds, per state, the true values found in the recording, in
	// time order; nil when it has none (only simulated plants publish them).
	Truth [][]TruthSample

	first, last time.Time // receive times of the first and last sample
	n           int       // samples of wired signals

	bus          bool      // a bus recording
	estimateTick time.Time // the time of the plant's first recorded estimate
	estimates    int       // the plant's estimates in the recording (not replayed)

	// A bus recording's samples, decoded; or a CSV recording's, read in
	// place.
	samples []replaySample
	csv     []recording.Sample
	cols    csvColumns
}

// replaySample is one sample of a wired signal, as Replay offers it, in 32
// bytes: a day at 10 Hz of five signals is 4.3 million of them.
type replaySample struct {
	signal   int32 // the engine's index: the plant's inputs, then its outputs
	line     int32 // the line of the recording
	value    float64
	at, recv int64 // the sample's own time and its receive time, Unix nanoseconds
}

// nanos returns t in Unix nanoseconds; recordings lie well inside the
// years 1678 to 2262 that this covers.
func nanos(t time.Time) int64 { return t.UnixNano() }

// TruthSample is one true value of a state in a recording.
type TruthSample struct {
	Time  time.Time
	Value float64
}

// lineOf narrows a line number to the 32 bits a sample keeps of it.
func lineOf(line int) int32 {
	return int32(min(line, math.MaxInt32))
}

// Len returns the number of samples of wired signals.
func (s *ReplaySource) Len() int { return s.n }

// wiring maps the names a recording uses to the engine's signals and the
// model's states.
type wiring struct {
	signal map[string]int // signal name or subject → engine index
	truth  map[string]int // truth column or subject → state index
	n      int
}

func newWiring(plant *config.Plant, bySubject bool) wiring {
	w := wiring{signal: map[string]int{}, truth: map[string]int{}}
	for i, ws := range append(append([]config.Wire(nil), plant.Inputs...), plant.Outputs...) {
		key := ws.Signal
		if bySubject {
			key = ws.Subject
		}
		w.signal[key] = i
	}
	n, _, _ := plant.Model.Dims()
	w.n = n
	for i := 0; i < n; i++ {
		name := signalName(plant.Model.States, i, "x")
		key := config.TruthColumn(name)
		if bySubject {
			key = plant.TruthSubject(name)
		}
		w.truth[key] = i
	}
	return w
}

// CSVColumns returns the column names a CSV recording of the plant may
// hold: its inputs and outputs, and the true states (TruthColumn). Pass
// them as recording.CSVOptions.Known, so that other columns are reported.
func CSVColumns(plant *config.Plant) []string {
	var cols []string
	for _, ws := range append(append([]config.Wire(nil), plant.Inputs...), plant.Outputs...) {
		cols = append(cols, ws.Signal)
	}
	n, _, _ := plant.Model.Dims()
	for i := 0; i < n; i++ {
		cols = append(cols, config.TruthColumn(signalName(plant.Model.States, i, "x")))
	}
	return cols
}

// skipped counts the samples of one name that were not wired, for one
// issue per name.
type skipped struct {
	line, n int
}

// NewCSVSource prepares a historian CSV recording for a replay of plant.
// Each row's time is both the sample time and the receive time. Columns
// named after an input or output are samples, columns named
// TruthColumn(state) the true states; any other column is skipped, with one
// issue (ReadCSV reports them already when given CSVColumns as Known). The
// source reads the recording's samples in place: rec must not change while
// the source is in use.
func NewCSVSource(plant *config.Plant, rec *recording.Recording) *ReplaySource {
	src := &ReplaySource{Name: rec.Name, Issues: append([]recording.Issue(nil), rec.Issues...), csv: rec.Samples}
	w := newWiring(plant, false)
	src.cols.index = map[string]int{}
	other := map[string]*skipped{}
	var order []string
	first := true
	for i := range rec.Samples {
		s := &rec.Samples[i]
		c := src.cols.lookup(s.Signal, &w)
		switch {
		case c.signal >= 0:
			src.n++
			if first {
				src.first, first = s.Time, false
			}
			src.last = s.Time
		case c.state >= 0:
			src.addTruth(w.n, c.state, s.Time, s.Value)
		default:
			if sk := other[s.Signal]; sk != nil {
				sk.n++
			} else {
				other[s.Signal] = &skipped{line: s.Line, n: 1}
				order = append(order, s.Signal)
			}
		}
	}
	for _, name := range order {
		sk := other[name]
		src.Issues = append(src.Issues, recording.Issue{Line: sk.line, Column: name,
			Msg: fmt.Sprintf("not a signal of plant %s: %d values skipped", plant.Name, sk.n)})
	}
	src.finish()
	return src
}

// csvColumn is what one CSV column is for a plant.
type csvColumn struct {
	name          string
	signal, state int // the engine's signal index or the state's, −1 when not one
}

// csvColumns finds the column of a sample by its signal name. The samples
// of one column share its name's string, and a row's samples come in column
// order, so the column after the previous sample's almost always matches,
// by the strings' pointers, without hashing.
type csvColumns struct {
	cols  []csvColumn
	index map[string]int // name → position in cols
	prev  int
}

func (c *csvColumns) lookup(name string, w *wiring) *csvColumn {
	if n := len(c.cols); n > 0 {
		next := c.prev + 1
		if next == n {
			next = 0
		}
		if c.cols[next].name == name {
			c.prev = next
			return &c.cols[next]
		}
		if c.cols[c.prev].name == name {
			return &c.cols[c.prev]
		}
	}
	i, ok := c.index[name]
	if !ok {
		col := csvColumn{name: name, signal: -1, state: -1}
		if w != nil {
			if j, ok := w.signal[name]; ok {
				col.signal = j
			} else if j, ok := w.truth[name]; ok {
				col.state = j
			}
		}
		i = len(c.cols)
		c.cols = append(c.cols, col)
		c.index[name] = i
	}
	c.prev = i
	return &c.cols[i]
}

// NewBusSource prepares a bus recording for a replay of plant: the
// messages on the subjects of its inputs and outputs are samples (their
// sample time is the payload's time when it has one, else the receive
// time), those on TruthSubject(state) the true states. A payload that does
// not decode is an issue with its line, and so are the messages of a
// subject that is neither (one issue per subject).
func NewBusSource(plant *config.Plant, rec *recording.BusRecording) *ReplaySource {
	src := &ReplaySource{Name: rec.Name, Issues: append([]recording.Issue(nil), rec.Issues...), bus: true}
	w := newWiring(plant, true)
	src.samples = make([]replaySample, 0, len(rec.Messages))
	other := map[string]*skipped{}
	var order []string
	estimates := EstimateSubject(plant)
	shadow := ShadowSubject(estimates)
	for i := range rec.Messages {
		m := &rec.Messages[i]
		j, isSignal := w.signal[m.Subject]
		k, isTruth := w.truth[m.Subject]
		if m.Subject == estimates || m.Subject == shadow {
			// The estimator's own output: the first tells the phase of its
			// ticks; none is replayed.
			if m.Subject == estimates && src.estimateTick.IsZero() {
				var est struct {
					Time time.Time `json:"time"`
				}
				if json.Unmarshal(m.Payload, &est) == nil && !est.Time.IsZero() {
					src.estimateTick = est.Time
				}
			}
			src.estimates++
			continue
		}
		if !isSignal && !isTruth {
			if sk := other[m.Subject]; sk != nil {
				sk.n++
			} else {
				other[m.Subject] = &skipped{line: m.Line, n: 1}
				order = append(order, m.Subject)
			}
			continue
		}
		v, at, err := DecodeSample(m.Payload, m.Recv)
		if err != nil {
			src.Issues = append(src.Issues, recording.Issue{Line: m.Line, Column: m.Subject, What: "subject", Msg: err.Error()})
			continue
		}
		if isTruth {
			src.addTruth(w.n, k, at, v)
			continue
		}
		src.samples = append(src.samples, replaySample{signal: int32(j), line: lineOf(m.Line), value: v, at: nanos(at), recv: nanos(m.Recv)})
	}
	for _, subj := range order {
		sk := other[subj]
		src.Issues = append(src.Issues, recording.Issue{Line: sk.line, Column: subj, What: "subject",
			Msg: fmt.Sprintf("not wired in plant %s: %d messages skipped", plant.Name, sk.n)})
	}
	src.finish()
	return src
}

// TruthCursor reads the true states of a source at increasing times.
type TruthCursor struct {
	truth [][]TruthSample
	at    []int
}

// TruthCursor returns a cursor over the source's true states; nil when the
// source has none.
func (s *ReplaySource) TruthCursor() *TruthCursor {
	if s.Truth == nil {
		return nil
	}
	return &TruthCursor{truth: s.Truth, at: make([]int, len(s.Truth))}
}

// At writes to dst the true value of each state at t — its latest true
// sample at or before t, NaN before the first — for times that do not
// decrease from call to call. It allocates nothing.
func (c *TruthCursor) At(t time.Time, dst []float64) {
	for i, ts := range c.truth {
		for c.at[i] < len(ts) && !ts[c.at[i]].Time.After(t) {
			c.at[i]++
		}
		dst[i] = math.NaN()
		if c.at[i] > 0 {
			dst[i] = ts[c.at[i]-1].Value
		}
	}
}

func (s *ReplaySource) addTruth(n, i int, t time.Time, v float64) {
	if s.Truth == nil {
		s.Truth = make([][]TruthSample, n)
	}
	s.Truth[i] = append(s.Truth[i], TruthSample{Time: t, Value: v})
}

// finish orders the truth by time and notes the first and last receive
// times. The readers give samples in receive order already.
func (s *ReplaySource) finish() {
	for _, ts := range s.Truth {
		sort.SliceStable(ts, func(a, b int) bool { return ts[a].Time.Before(ts[b].Time) })
	}
	if s.csv == nil {
		s.n = len(s.samples)
		if s.n > 0 {
			s.first, s.last = time.Unix(0, s.samples[0].recv), time.Unix(0, s.samples[s.n-1].recv)
		}
	}
	sort.SliceStable(s.Issues, func(a, b int) bool { return s.Issues[a].Line < s.Issues[b].Line })
}

// FirstTick returns the time of the first tick Replay uses when
// ReplayOptions.Start is zero, and how it was chosen:
//
//   - a bus recording that holds the plant's own estimates: the first
//     estimate's time, so that the ticks fall where the recorded daemon's
//     did (and the replay reproduces its estimates once its state has
//     converged from the initial one);
//   - another bus recording: half a sample period after the samples'
//     typical arrival (the circular mean of their receive times modulo the
//     period), so that each sample arrives well before the tick it belongs
//     to — ticks right at the arrival times would find the samples of one
//     burst on either side of them;
//   - a CSV recording: the first row's time, whose samples the first tick
//     takes.
func (s *ReplaySource) FirstTick(plant *config.Plant) (time.Time, string) {
	switch {
	case !s.bus:
		return s.first, "the first row's time"
	case !s.estimateTick.IsZero():
		return s.estimateTick, fmt.Sprintf("the time of the first of %d estimates in the recording", s.estimates)
	case s.n == 0:
		return s.first, "the first sample's receive time"
	}
	ts := float64(periodOf(plant))
	if ts <= 0 {
		return s.first, "the first sample's receive time"
	}
	var c, sn float64
	for i := range s.samples {
		phase := math.Mod(float64(s.samples[i].recv-s.samples[0].recv), ts) / ts * 2 * math.Pi
		c += math.Cos(phase)
		sn += math.Sin(phase)
	}
	arrival := math.Atan2(sn, c) / (2 * math.Pi) // in (−½, ½] periods
	offset := math.Mod(arrival+0.5+1, 1)         // half a period later, in [0, 1)
	return s.first.Add(time.Duration(offset * ts)), fmt.Sprintf("half a period after the samples' typical arrival, %v after the first", time.Duration(offset*ts).Round(time.Microsecond))
}

// ReplayOptions are the settings of Replay. The zero value ticks from
// ReplaySource.FirstTick to the last sample.
type ReplayOptions struct {
	// Start is the time of the first tick; zero means
	// ReplaySource.FirstTick. The samples received before it are offered
	// before the first tick.
	Start time.Time
	// End is the time at or after which the last tick falls; zero means the
	// receive time of the last sample.
	End time.Time
	// Window is the engines' NIS and RMS window (EngineOptions.Window).
	Window int
	// Tick, when not nil, is called after every tick of every engine with
	// the index of its gain set, the tick's number from 0 and its estimate,
	// which is reused: copy what you keep.
	Tick func(set, k int, est *Estimate)
	// Progress, when not nil, is called before the first tick (with 0
	// done), about a hundred times during the replay and at the end, with
	// the ticks done and their total.
	Progress func(done, total int)
}

// ReplayResult is what a replay found besides the estimates.
type ReplayResult struct {
	// Start is the time of the first tick, Ticks the number of ticks of
	// each gain set.
	Start time.Time
	Ticks int
	// Signals are the plant's inputs, then its outputs, with what became
	// of their samples.
	Signals []SignalCount
	// Issues are the source's and the samples the engines refused (one per
	// signal and reason, at the first such sample's line), by line.
	Issues []recording.Issue
	// Truth[i][k] is the true value of state i at tick k — the latest true
	// sample at or before the tick — or NaN before the first; nil when the
	// recording has no true states.
	Truth [][]float64
}

// SignalCount accounts for the samples of one signal in a replay (of the
// first gain set; the engines see the same samples). For an output,
// Offered = Refused + Used + Stale + Superseded; for an input every
// accepted sample is held in turn, so only Offered and Refused are counted.
// After counts the samples received after the last tick (ReplayOptions.End
// before the end of the recording), which were not offered.
type SignalCount struct {
	Name    string
	Output  bool
	Offered int
	Refused [numReasons]int
	// Used counts the samples a tick took and kept (corrected with, or
	// rejected by the gate, or present without a gain for its pattern).
	Used int
	// Stale counts those a tick took that were older than max_age.
	Stale int
	// Superseded counts those a newer sample replaced before a tick took
	// them.
	Superseded int
	After      int
}

// RefusedTotal returns the number of samples refused for any reason.
func (c *SignalCount) RefusedTotal() int {
	n := 0
	for _, v := range c.Refused {
		n += v
	}
	return n
}

// replayState is what Replay keeps while it offers samples.
type replayState struct {
	engines  []*Engine
	res      *ReplayResult
	accepted []int             // per signal
	first    [][numReasons]int // per signal and reason, the line of the first refused
}

// offer offers one sample to every engine and counts what the first made
// of it.
func (st *replayState) offer(sig int, v float64, at, recv time.Time, line int) {
	c := &st.res.Signals[sig]
	c.Offered++
	r, ok := st.engines[0].Offer(sig, v, at, recv)
	for _, e := range st.engines[1:] {
		e.Offer(sig, v, at, recv)
	}
	if ok {
		st.accepted[sig]++
		return
	}
	if c.Refused[r] == 0 {
		st.first[sig][r] = line
	}
	c.Refused[r]++
}

// Replay drives one engine per gain set over the source on virtual time,
// exactly as the daemon drives its engine on the clock (Engine.Tick):
// ticks at t0 + k·Ts, and before each tick every sample received at or
// before it, in the order received, offered to every engine. The engines
// apply the same hold, staleness, use-once, gate and status rules as live.
// sets are the gain sets, prepared for the plant's model; each engine runs
// one as its active set.
//
// Replay allocates nothing per tick or sample apart from what opts.Tick
// and the result's Truth columns take.
func Replay(plant *config.Plant, sets []*estimator.Prepared, src *ReplaySource, opts ReplayOptions) (*ReplayResult, error) {
	if len(sets) == 0 {
		return nil, errors.New("replay: no gain set to run")
	}
	if src.n == 0 {
		return nil, fmt.Errorf("replay: %s holds no sample of a signal of plant %s", src.Name, plant.Name)
	}
	ts := periodOf(plant)
	if ts <= 0 {
		return nil, fmt.Errorf("replay: sample time %v s is not a positive duration", plant.Model.Ts)
	}
	t0, end := opts.Start, opts.End
	if t0.IsZero() {
		t0, _ = src.FirstTick(plant)
	}
	if end.IsZero() {
		end = src.last
	}
	if end.Before(t0) {
		if !opts.End.IsZero() {
			return nil, fmt.Errorf("replay: the end %v is before the first tick %v", end, t0)
		}
		end = t0 // a recording shorter than the offset of the first tick
	}
	span := end.Sub(t0)
	ticks := int(span/ts) + 1
	if time.Duration(ticks-1)*ts < span {
		ticks++ // the last tick at or after the end
	}
	engines := make([]*Engine, len(sets))
	ests := make([]*Estimate, len(sets))
	for i, p := range sets {
		engines[i] = NewEngine(plant, p, EngineOptions{Window: opts.Window})
		ests[i] = engines[i].NewEstimate()
	}
	_, m, p := plant.Model.Dims()
	res := &ReplayResult{Start: t0, Ticks: ticks, Signals: make([]SignalCount, m+p)}
	for i := range res.Signals {
		res.Signals[i].Name = engines[0].SignalName(i)
		res.Signals[i].Output = i >= m
	}
	st := replayState{engines: engines, res: res, accepted: make([]int, m+p), first: make([][numReasons]int, m+p)}

	var truth [][]float64
	var truthNow []float64
	cursor := src.TruthCursor()
	if cursor != nil {
		truth = make([][]float64, len(src.Truth))
		truthNow = make([]float64, len(src.Truth))
		for i := range truth {
			truth[i] = make([]float64, ticks)
		}
	}
	if opts.Progress != nil {
		opts.Progress(0, ticks)
	}

	every := max(1, ticks/100)
	next := 0
	for k := 0; k < ticks; k++ {
		t := t0.Add(time.Duration(k) * ts)
		if src.csv != nil {
			for ; next < len(src.csv) && !src.csv[next].Time.After(t); next++ {
				smp := &src.csv[next]
				if c := src.cols.lookup(smp.Signal, nil); c.signal >= 0 {
					st.offer(c.signal, smp.Value, smp.Time, smp.Time, smp.Line)
				}
			}
		} else {
			tn := nanos(t)
			for ; next < len(src.samples) && src.samples[next].recv <= tn; next++ {
				smp := &src.samples[next]
				st.offer(int(smp.signal), smp.value, time.Unix(0, smp.at), time.Unix(0, smp.recv), int(smp.line))
			}
		}
		for i, e := range engines {
			e.Tick(t, ests[i])
			if i == 0 {
				for j := range ests[0].Outputs {
					o := &ests[0].Outputs[j]
					c := &res.Signals[m+j]
					switch {
					case o.Stale:
						c.Stale++
					case !math.IsNaN(o.Measured):
						c.Used++
					}
				}
			}
			if opts.Tick != nil {
				opts.Tick(i, k, ests[i])
			}
		}
		if cursor != nil {
			cursor.At(t, truthNow)
			for i, col := range truth {
				col[k] = truthNow[i]
			}
		}
		if opts.Progress != nil && (k+1)%every == 0 {
			opts.Progress(k+1, ticks)
		}
	}
	if opts.Progress != nil && ticks%every != 0 {
		opts.Progress(ticks, ticks)
	}
	// Samples received after the last tick were never offered: with End
	// given, the rest of the recording.
	for ; next < len(src.samples); next++ {
		res.Signals[src.samples[next].signal].After++
	}
	for ; next < len(src.csv); next++ {
		if c := src.cols.lookup(src.csv[next].Signal, nil); c.signal >= 0 {
			res.Signals[c.signal].After++
		}
	}
	for i := range res.Signals {
		c := &res.Signals[i]
		if c.Output {
			// Accepted samples a tick never took were replaced by a newer
			// one (every sample offered is dated at or before the last tick).
			c.Superseded = st.accepted[i] - c.Used - c.Stale
		}
	}
	res.Issues = append([]recording.Issue(nil), src.Issues...)
	for i := range res.Signals {
		c := &res.Signals[i]
		for r := Reason(0); r < numReasons; r++ {
			if c.Refused[r] == 0 {
				continue
			}
			res.Issues = append(res.Issues, recording.Issue{Line: st.first[i][r], Column: c.Name, What: "signal",
				Msg: fmt.Sprintf("%d %s refused by the engine (%s)%s", c.Refused[r], replayPlural(c.Refused[r], "sample"), r, refusalHint(r))})
		}
	}
	sort.SliceStable(res.Issues, func(a, b int) bool { return res.Issues[a].Line < res.Issues[b].Line })
	res.Truth = truth
	return res, nil
}

// refusalHint explains a reason for refusal in a replay.
func refusalHint(r Reason) string {
	switch r {
	case ReasonRange:
		return ": outside the signal's range in the plant file"
	case ReasonNaN:
		return ": not a finite number"
	case ReasonLate:
		return ": dated at or before a tick that had already run when it was received"
	}
	return ""
}

func replayPlural(n int, word string) string {
	if n == 1 {
		return word
	}
	return word + "s"
}

// String formats the accounting of one signal on one line.
func (c *SignalCount) String() string {
	var b strings.Builder
	fmt.Fprintf(&b, "%s: %d offered", c.Name, c.Offered)
	if n := c.RefusedTotal(); n > 0 {
		fmt.Fprintf(&b, ", %d refused (", n)
		sep := ""
		for r := Reason(0); r < numReasons; r++ {
			if c.Refused[r] > 0 {
				fmt.Fprintf(&b, "%s%s %d", sep, r, c.Refused[r])
				sep = ", "
			}
		}
		b.WriteString(")")
	}
	if c.Output {
		fmt.Fprintf(&b, ", %d used, %d stale, %d superseded", c.Used, c.Stale, c.Superseded)
	}
	if c.After > 0 {
		fmt.Fprintf(&b, ", %d received after the last tick", c.After)
	}
	return b.String()
}
