package simplant

import (
	"fmt"
	"math"
	"strconv"
	"strings"
	"time"

	"surmise/config"
)

// Kind is the kind of a scenario event; its String is the event's key in a
// scenario file.
type Kind uint8

// The kinds of event (see the package documentation).
const (
	Step    Kind = iota + 1 // an input takes a new value
	PRBS                    // an input switches between two values, pseudo-randomly
	Dropout                 // a signal is not published
	Bias                    // an output's reading is offset
	Spikes                  // single readings of an output are offset
	Slow                    // a signal is published on one sample in Ticks
	Jitter                  // samples arrive late by a random delay
	numKinds
)

var kindNames = [numKinds]string{
	Step: "step", PRBS: "prbs", Dropout: "dropout", Bias: "bias",
	Spikes: "spikes", Slow: "slow", Jitter: "jitter",
}

// String returns the key of the kind in a scenario file ("step", …).
func (k Kind) String() string {
	if k == 0 || k >= numKinds {
		return "Kind(" + strconv.Itoa(int(k)) + ")"
	}
	return kindNames[k]
}

// AllSignals is the signal name of a jitter event that delays every wired
// signal.
const AllSignals = "all"

// Event is one scripted event of a scenario. Which fields mean something
// depends on Kind; the others are zero.
type Event struct {
	Kind   Kind
	Signal string        // the input or output it acts on; AllSignals for a jitter on every signal
	At     time.Duration // when it starts, from the start of the scenario

	// For is how long it lasts (prbs, dropout, slow, jitter; bias, where
	// zero means to the end of the scenario).
	For time.Duration
	// Value is the new input (step), the offset (bias) or the first spike's
	// offset (spikes; the signs alternate).
	Value float64
	// Low and High are the two values of a prbs.
	Low, High float64
	// Hold is the clock period of a prbs: the shortest time between switches.
	Hold time.Duration
	// Count is the number of spikes; Every the time between them.
	Count int
	Every time.Duration
	// Ticks: a slow signal is published on one sample in Ticks.
	Ticks int
	// Max is the largest arrival delay of a jitter.
	Max time.Duration

	// Line is the line of the scenario file the event was written on; 0 for
	// built-in scenarios.
	Line int
}

// end returns when the event stops acting (the first time after it), and
// whether it has an end: a step and an open bias have none, and spikes end
// with their last spike (lastSpike).
func (ev *Event) end() (time.Duration, bool) {
	switch ev.Kind {
	case Step, Spikes:
		return ev.At, false
	case Bias:
		if ev.For == 0 {
			return ev.At, false
		}
	}
	return ev.At + ev.For, true
}

// lastSpike returns the time of the last spike of a spikes event.
// It saturates at a large time instead of overflowing.
func (ev *Event) lastSpike() time.Duration {
	n := time.Duration(max(ev.Count-1, 0))
	if ev.Every > 0 && n > 0 && n > (1<<62)/ev.Every {
		return 1 << 62
	}
	return ev.At + n*ev.Every
}

// Scenario is a script of timed events for a simulated plant. A Scenario
// from ParseScenario or Builtin has been checked against its plant; one
// built by hand is checked by New.
type Scenario struct {
	Name   string
	Length time.Duration // the scenario's length; events end by then
	Repeat bool          // start over every Length
	Events []Event       // in file order
}

// BuiltinNames are the names Builtin knows.
var BuiltinNames = []string{"rehearsal", "steady"}

// Builtin returns the built-in scenario name for the plant (see the package
// documentation). The events are made from the plant's wiring and noise:
// the inputs move within their valid ranges around their nominal values, and
// offsets are multiples of each output's measurement noise. The timeline is
// set for a sample time of a second or less and stretched for slower plants.
func Builtin(name string, plant *config.Plant) (*Scenario, error) {
	md := plant.Model
	_, m, p := md.Dims()
	// u is the time unit of the timeline: a second, or the sample time if
	// that is longer, so that every event spans several samples.
	u := max(time.Second, seconds(md.Ts))
	at := func(k int) time.Duration { return time.Duration(k) * u }
	sc := &Scenario{Name: name, Length: at(120), Repeat: true}
	lowHigh := func(i int) (lo, hi float64) {
		w := plant.Inputs[i]
		nom := nominal(md.U0, i)
		span := math.Max(1, 0.2*math.Abs(nom))
		if w.HasRange {
			span = 0.2 * (w.Max - w.Min)
			return math.Max(nom-span, w.Min), math.Min(nom+span, w.Max)
		}
		return nom - span, nom + span
	}
	switch name {
	case "steady":
		for i := 0; i < m; i++ {
			lo, hi := lowHigh(i)
			sc.Events = append(sc.Events, Event{Kind: PRBS, Signal: plant.Inputs[i].Signal, At: 0, For: at(120), Low: lo, High: hi, Hold: at(4)})
		}
		return sc, nil
	case "rehearsal":
	default:
		return nil, fmt.Errorf("simplant: no built-in scenario %q (there are: %s)", name, strings.Join(BuiltinNames, ", "))
	}
	// Excite every input: a PRBS, then a step up and a step down.
	for i := 0; i < m; i++ {
		lo, hi := lowHigh(i)
		s := plant.Inputs[i].Signal
		sc.Events = append(sc.Events,
			Event{Kind: PRBS, Signal: s, At: 0, For: at(40), Low: lo, High: hi, Hold: at(4)},
			Event{Kind: Step, Signal: s, At: at(40), Value: hi},
			Event{Kind: Step, Signal: s, At: at(80), Value: lo},
		)
	}
	first, last := plant.Outputs[0].Signal, plant.Outputs[p-1].Signal
	sigma := func(j int) float64 {
		if md.R != nil {
			if v := md.R.At(j, j); v > 0 {
				return math.Sqrt(v)
			}
		}
		if w := plant.Outputs[j]; w.HasRange {
			return 0.01 * (w.Max - w.Min)
		}
		return 1
	}
	sc.Events = append(sc.Events,
		Event{Kind: Dropout, Signal: first, At: at(20), For: at(10)},
		Event{Kind: Bias, Signal: last, At: at(45), For: at(20), Value: 20 * sigma(p-1)},
		Event{Kind: Spikes, Signal: first, At: at(70), Value: 40 * sigma(0), Count: 3, Every: at(4)},
		Event{Kind: Slow, Signal: last, At: at(85), For: at(20), Ticks: 5},
		Event{Kind: Jitter, Signal: AllSignals, At: at(105), For: at(15), Max: 2 * seconds(md.Ts) / 5},
	)
	return sc, nil
}

// seconds converts a time in seconds to a Duration, rounded to the nanosecond.
func seconds(s float64) time.Duration { return time.Duration(math.Round(s * 1e9)) }

// nominal returns v[i], or 0 for a nil operating point.
func nominal(v []float64, i int) float64 {
	if v == nil {
		return 0
	}
	return v[i]
}

// Format writes sc as a scenario file that ParseScenario reads back to the
// same scenario (numbers are written with all their digits).
func Format(sc *Scenario) []byte {
	var b strings.Builder
	b.WriteString("# A scenario for surmise simulate: timed events in plant time (see `go doc surmise/daemon/simplant`).\n")
	if sc.Name != "" {
		fmt.Fprintf(&b, "name: %s\n", strconv.Quote(sc.Name))
	}
	fmt.Fprintf(&b, "length: %s\nrepeat: %t\nevents:\n", sc.Length, sc.Repeat)
	num := func(v float64) string { return strconv.FormatFloat(v, 'g', -1, 64) }
	for _, ev := range sc.Events {
		fmt.Fprintf(&b, "  - {at: %s, %s: %s", ev.At, ev.Kind, strconv.Quote(ev.Signal))
		switch ev.Kind {
		case Step:
			fmt.Fprintf(&b, ", value: %s", num(ev.Value))
		case PRBS:
			fmt.Fprintf(&b, ", low: %s, high: %s, hold: %s, for: %s", num(ev.Low), num(ev.High), ev.Hold, ev.For)
		case Dropout:
			fmt.Fprintf(&b, ", for: %s", ev.For)
		case Bias:
			fmt.Fprintf(&b, ", value: %s", num(ev.Value))
			if ev.For > 0 {
				fmt.Fprintf(&b, ", for: %s", ev.For)
			}
		case Spikes:
			fmt.Fprintf(&b, ", value: %s, count: %d", num(ev.Value), ev.Count)
			if ev.Count > 1 {
				fmt.Fprintf(&b, ", every: %s", ev.Every)
			}
		case Slow:
			fmt.Fprintf(&b, ", ticks: %d, for: %s", ev.Ticks, ev.For)
		case Jitter:
			fmt.Fprintf(&b, ", max: %s, for: %s", ev.Max, ev.For)
		}
		b.WriteString("}\n")
	}
	return []byte(b.String())
}
