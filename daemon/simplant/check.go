package simplant

import (
	"fmt"
	"time"

	"surmise/config"
)

// problem is one thing wrong with a scenario: the field of an event (the
// event's kind key for its signal, "" for the event as a whole) or of the
// scenario (event −1), and the message.
type problem struct {
	event int
	field string
	msg   string
}

// signalKind says what a name is in a plant: an input, an output, or neither.
type signalKind uint8

const (
	notWired signalKind = iota
	isInput
	isOutput
)

// lookup returns what name is in the plant and its wiring.
func lookup(plant *config.Plant, name string) (signalKind, config.Wire) {
	for _, w := range plant.Inputs {
		if w.Signal == name {
			return isInput, w
		}
	}
	for _, w := range plant.Outputs {
		if w.Signal == name {
			return isOutput, w
		}
	}
	return notWired, config.Wire{}
}

// maxCount bounds the spikes of one event and the ticks of a slow signal, so
// that a scenario cannot ask for absurd loops.
const maxCount = 1_000_000

// check returns what is wrong with sc for plant, scenario problems first and
// then the events' in order.
func check(sc *Scenario, plant *config.Plant) []problem {
	var ps []problem
	add := func(ev int, field, format string, args ...any) {
		ps = append(ps, problem{ev, field, fmt.Sprintf(format, args...)})
	}
	if sc.Length <= 0 && len(sc.Events) > 0 {
		add(-1, "length", "want a positive duration, got %v", sc.Length)
	}
	if len(sc.Events) == 0 {
		add(-1, "events", "want at least one event")
	}
	for i := range sc.Events {
		ev := &sc.Events[i]
		key := ev.Kind.String()
		if ev.At < 0 {
			add(i, "at", "want a time at or after the start, got %v", ev.At)
		}
		kind, w := lookup(plant, ev.Signal)
		switch {
		case ev.Kind == 0 || ev.Kind >= numKinds:
			add(i, "", "unknown kind of event %v", ev.Kind)
			continue
		case ev.Kind == Jitter && ev.Signal == AllSignals:
		case kind == notWired:
			add(i, key, "%q is not an input or output of plant %s", ev.Signal, plant.Name)
		case (ev.Kind == Step || ev.Kind == PRBS) && kind != isInput:
			add(i, key, "%q is an output; a %s acts on an input", ev.Signal, key)
		case (ev.Kind == Bias || ev.Kind == Spikes) && kind != isOutput:
			add(i, key, "%q is an input; %s acts on an output", ev.Signal, key)
		}
		inRange := func(field string, v float64) {
			if kind == isInput && w.HasRange && (v < w.Min || v > w.Max) {
				add(i, field, "%g is outside the range [%g, %g] of %s", v, w.Min, w.Max, ev.Signal)
			}
		}
		positive := func(field string, d time.Duration) {
			if d <= 0 {
				add(i, field, "want a positive duration, got %v", d)
			}
		}
		switch ev.Kind {
		case Step:
			inRange("value", ev.Value)
		case PRBS:
			inRange("low", ev.Low)
			inRange("high", ev.High)
			if !(ev.Low < ev.High) {
				add(i, "high", "want more than low (%g), got %g", ev.Low, ev.High)
			}
			positive("hold", ev.Hold)
			positive("for", ev.For)
		case Dropout:
			positive("for", ev.For)
		case Bias:
			if ev.For < 0 {
				add(i, "for", "want a positive duration, got %v", ev.For)
			}
			if ev.Value == 0 {
				add(i, "value", "a bias of 0 does nothing")
			}
		case Spikes:
			if ev.Value == 0 {
				add(i, "value", "a spike of 0 does nothing")
			}
			if ev.Count < 1 || ev.Count > maxCount {
				add(i, "count", "want 1 to %d spikes, got %d", maxCount, ev.Count)
			}
			if ev.Count > 1 {
				positive("every", ev.Every)
			}
		case Slow:
			if ev.Ticks < 2 || ev.Ticks > maxCount {
				add(i, "ticks", "want 2 to %d (1 would be every sample), got %d", maxCount, ev.Ticks)
			}
			positive("for", ev.For)
		case Jitter:
			positive("max", ev.Max)
			positive("for", ev.For)
		}
		if end, ok := ev.end(); ok && sc.Length > 0 && end > sc.Length {
			add(i, "", "ends at %v, after the scenario's length %v", end, sc.Length)
		}
		if ev.At >= sc.Length && sc.Length > 0 && ev.At >= 0 {
			add(i, "at", "%v is not before the scenario's length %v", ev.At, sc.Length)
		} else if last := ev.lastSpike(); ev.Kind == Spikes && last >= sc.Length && sc.Length > 0 && ev.Count <= maxCount {
			add(i, "", "the last spike, at %v, is not before the scenario's length %v", last, sc.Length)
		}
	}
	return ps
}

// validate returns the problems of a hand-built scenario as one error.
func validate(sc *Scenario, plant *config.Plant) error {
	ps := check(sc, plant)
	if len(ps) == 0 {
		return nil
	}
	l := &config.ErrorList{}
	name := sc.Name
	if name == "" {
		name = "scenario"
	}
	for _, p := range ps {
		l.Errors = append(l.Errors, config.FieldError{File: name, Line: lineOf(sc, p.event), Field: fieldPath(sc, p), Msg: p.msg})
	}
	return l
}

func lineOf(sc *Scenario, ev int) int {
	if ev < 0 {
		return 0
	}
	return sc.Events[ev].Line
}

// fieldPath is the dotted path of a problem's field: "length",
// "events[3].value", or "events[3]" for the event as a whole.
func fieldPath(sc *Scenario, p problem) string {
	if p.event < 0 {
		return p.field
	}
	s := fmt.Sprintf("events[%d]", p.event)
	if p.field != "" {
		s += "." + p.field
	}
	return s
}
