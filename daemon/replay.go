package daemon

import (
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

// TruthSubject returns the subject on which a simulated plant publishes the
// true value of a state: "<publish prefix>.truth.<state>" (by default
// surmise.<name>.truth.<state>). A replay of a bus recording that holds
// these subjects compares the estimates with them.
func TruthSubject(plant *config.Plant, state string) string {
	prefix := plant.Publish
	if prefix == "" {
		prefix = config.PublishRoot + "." + plant.Name
	}
	return prefix + ".truth." + state
}

// TruthColumn returns the CSV column name of the true value of a state,
// "truth.<state>", as `surmise simulate --csv` writes it.
func TruthColumn(state string) string { return "truth." + state }

// ReplaySource is a recording prepared for Replay: the samples of the plant's
// wired signals in the order they were received, the true states when the
// recording has them, and every issue found in reading and preparing it.
// Build it with NewCSVSource or NewBusSource.
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
	samples     []ReplaySample
}

// ReplaySample is one sample of a wired signal, as Replay offers it.
type ReplaySample struct {
	Signal int       // the engine's index: the plant's inputs, then its outputs
	Value  float64   // as decoded; the engine judges its range
	Time   time.Time // the sample's own time (the payload's, else Recv)
	Recv   time.Time // when it was received (for a CSV row, its time)
	Line   int       // the line of the recording
}

// TruthSample is one true value of a state in a recording.
type TruthSample struct {
	Time  time.Time
	Value float64
}

// Len returns the number of samples of wired signals.
func (s *ReplaySource) Len() int { return len(s.samples) }

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
		key := TruthColumn(name)
		if bySubject {
			key = TruthSubject(plant, name)
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
		cols = append(cols, TruthColumn(signalName(plant.Model.States, i, "x")))
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
// issue (ReadCSV reports them already when given CSVColumns as Known).
func NewCSVSource(plant *config.Plant, rec *recording.Recording) *ReplaySource {
	src := &ReplaySource{Name: rec.Name, Issues: append([]recording.Issue(nil), rec.Issues...)}
	w := newWiring(plant, false)
	src.samples = make([]ReplaySample, 0, len(rec.Samples))
	other := map[string]*skipped{}
	var order []string
	for i := range rec.Samples {
		s := &rec.Samples[i]
		if j, ok := w.signal[s.Signal]; ok {
			src.samples = append(src.samples, ReplaySample{Signal: j, Value: s.Value, Time: s.Time, Recv: s.Time, Line: s.Line})
			continue
		}
		if j, ok := w.truth[s.Signal]; ok {
			src.addTruth(w.n, j, s.Time, s.Value)
			continue
		}
		if sk := other[s.Signal]; sk != nil {
			sk.n++
		} else {
			other[s.Signal] = &skipped{line: s.Line, n: 1}
			order = append(order, s.Signal)
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

// NewBusSource prepares a bus recording for a replay of plant: the
// messages on the subjects of its inputs and outputs are samples (their
// sample time is the payload's time when it has one, else the receive
// time), those on TruthSubject(state) the true states. A payload that does
// not decode is an issue with its line, and so are the messages of a
// subject that is neither (one issue per subject).
func NewBusSource(plant *config.Plant, rec *recording.BusRecording) *ReplaySource {
	src := &ReplaySource{Name: rec.Name, Issues: append([]recording.Issue(nil), rec.Issues...)}
	w := newWiring(plant, true)
	src.samples = make([]ReplaySample, 0, len(rec.Messages))
	other := map[string]*skipped{}
	var order []string
	for i := range rec.Messages {
		m := &rec.Messages[i]
		j, isSignal := w.signal[m.Subject]
		k, isTruth := w.truth[m.Subject]
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
			src.Issues = append(src.Issues, recording.Issue{Line: m.Line, Column: m.Subject, Msg: err.Error()})
			continue
		}
		if isTruth {
			src.addTruth(w.n, k, at, v)
			continue
		}
		src.samples = append(src.samples, ReplaySample{Signal: j, Value: v, Time: at, Recv: m.Recv, Line: m.Line})
	}
	for _, subj := range order {
		sk := other[subj]
		src.Issues = append(src.Issues, recording.Issue{Line: sk.line, Column: subj,
			Msg: fmt.Sprintf("subject not wired in plant %s: %d messages skipped", plant.Name, sk.n)})
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
	if len(s.samples) > 0 {
		s.first, s.last = s.samples[0].Recv, s.samples[len(s.samples)-1].Recv
	}
	sort.SliceStable(s.Issues, func(a, b int) bool { return s.Issues[a].Line < s.Issues[b].Line })
}

// ReplayOptions are the settings of Replay. The zero value ticks from the
// first sample to the last.
type ReplayOptions struct {
	// Start is the time of the first tick; zero means the receive time of
	// the first sample. The samples received before it are offered before
	// the first tick.
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

// replayRefusal is the first sample refused for one reason of one signal.
type replayRefusal struct {
	line int
	at   time.Time
}

// Replay drives one engine per gain set over the source on virtual time,
// exactly as the daemon drives its engine on the clock (DESIGN.md §3):
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
	if len(src.samples) == 0 {
		return nil, fmt.Errorf("replay: %s holds no sample of a signal of plant %s", src.Name, plant.Name)
	}
	ts := periodOf(plant)
	if ts <= 0 {
		return nil, fmt.Errorf("replay: sample time %v s is not a positive duration", plant.Model.Ts)
	}
	t0, end := opts.Start, opts.End
	if t0.IsZero() {
		t0 = src.first
	}
	if end.IsZero() {
		end = src.last
	}
	if end.Before(t0) {
		return nil, fmt.Errorf("replay: the end %v is before the first tick %v", end, t0)
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
	var firstRefusal [][numReasons]replayRefusal
	firstRefusal = make([][numReasons]replayRefusal, m+p)
	accepted := make([]int, m+p)

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
		for ; next < len(src.samples) && !src.samples[next].Recv.After(t); next++ {
			s := &src.samples[next]
			c := &res.Signals[s.Signal]
			c.Offered++
			r, ok := engines[0].Offer(s.Signal, s.Value, s.Time, s.Recv)
			for _, e := range engines[1:] {
				e.Offer(s.Signal, s.Value, s.Time, s.Recv)
			}
			if ok {
				accepted[s.Signal]++
				continue
			}
			if c.Refused[r] == 0 {
				firstRefusal[s.Signal][r] = replayRefusal{line: s.Line, at: s.Time}
			}
			c.Refused[r]++
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
		res.Signals[src.samples[next].Signal].After++
	}
	for i := range res.Signals {
		c := &res.Signals[i]
		if c.Output {
			// Accepted samples a tick never took were replaced by a newer
			// one (every sample offered is dated at or before the last tick).
			c.Superseded = accepted[i] - c.Used - c.Stale
		}
	}
	res.Issues = append([]recording.Issue(nil), src.Issues...)
	for i := range res.Signals {
		c := &res.Signals[i]
		for r := Reason(0); r < numReasons; r++ {
			if c.Refused[r] == 0 {
				continue
			}
			f := firstRefusal[i][r]
			res.Issues = append(res.Issues, recording.Issue{Line: f.line, Column: c.Name,
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
