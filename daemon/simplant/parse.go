package simplant

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"time"

	"gopkg.in/yaml.v3"

	"surmise/config"
)

// LoadScenario reads and parses a scenario file for the plant.
func LoadScenario(path string, plant *config.Plant) (*Scenario, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("simplant: read scenario: %w", err)
	}
	return ParseScenario(path, data, plant)
}

// ParseScenario parses and checks the scenario file data for the plant
// (see the package documentation for the format); filename is used in error
// messages. On failure the error is a *config.ErrorList holding every
// problem found, each with its line, column and field.
func ParseScenario(filename string, data []byte, plant *config.Plant) (*Scenario, error) {
	w := &walker{file: filename}
	sc, nodes := w.scenario(data, plant)
	if sc != nil && len(w.errs) == 0 {
		for _, p := range check(sc, plant) {
			n := nodes.scenario[p.field]
			if p.event >= 0 {
				n = nodes.events[p.event][p.field]
				if n == nil {
					n = nodes.events[p.event][""]
				}
			}
			w.errorf(n, fieldPath(sc, p), "%s", p.msg)
		}
	}
	if len(w.errs) > 0 {
		slices.SortStableFunc(w.errs, func(a, b config.FieldError) int {
			if a.Line != b.Line {
				return a.Line - b.Line
			}
			return a.Column - b.Column
		})
		return nil, &config.ErrorList{Errors: w.errs}
	}
	return sc, nil
}

// Limits on a scenario file.
const (
	maxEvents    = 10_000
	maxNodes     = 1 << 16 // nodes visited, aliases counted each time they are followed
	maxErrors    = 100
	maxFileBytes = 1 << 20
)

// walker walks the YAML node tree of one scenario file and collects errors.
type walker struct {
	file    string
	errs    []config.FieldError
	nodes   int
	stopped bool
}

// positions are the nodes of the scenario's fields and of each event's
// fields ("" is the event's mapping), to place the problems check finds.
type positions struct {
	scenario map[string]*yaml.Node
	events   []map[string]*yaml.Node
}

func (w *walker) errorf(n *yaml.Node, field, format string, args ...any) {
	if w.stopped {
		return
	}
	e := config.FieldError{File: w.file, Field: field, Msg: fmt.Sprintf(format, args...)}
	if n != nil {
		e.Line, e.Column = n.Line, n.Column
	}
	w.errs = append(w.errs, e)
	if len(w.errs) >= maxErrors {
		w.errs = append(w.errs, config.FieldError{File: w.file, Msg: fmt.Sprintf("more than %d errors; stopped", maxErrors)})
		w.stopped = true
	}
}

var yamlLine = regexp.MustCompile(`^yaml: line (\d+): (.*)$`)

// document returns the one document's root node, or nil after an error.
func (w *walker) document(data []byte) *yaml.Node {
	if len(data) > maxFileBytes {
		w.errorf(nil, "", "%d bytes: a scenario file is at most %d", len(data), maxFileBytes)
		return nil
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var doc yaml.Node
	if err := dec.Decode(&doc); err != nil {
		if errors.Is(err, io.EOF) {
			w.errorf(nil, "", "empty file: want a scenario")
			return nil
		}
		msg := err.Error()
		if m := yamlLine.FindStringSubmatch(msg); m != nil {
			line, _ := strconv.Atoi(m[1])
			w.errs = append(w.errs, config.FieldError{File: w.file, Line: line, Msg: "YAML syntax: " + m[2]})
		} else {
			w.errorf(nil, "", "YAML: %s", strings.TrimPrefix(msg, "yaml: "))
		}
		return nil
	}
	var extra yaml.Node
	switch err := dec.Decode(&extra); {
	case errors.Is(err, io.EOF):
	case err != nil:
		w.errorf(nil, "", "YAML: %s", strings.TrimPrefix(err.Error(), "yaml: "))
		return nil
	default:
		w.errorf(&extra, "", "a second YAML document: a scenario file holds exactly one")
		return nil
	}
	if len(doc.Content) != 1 || (doc.Content[0].Kind == yaml.ScalarNode && doc.Content[0].Tag == "!!null") {
		w.errorf(&doc, "", "empty file: want a scenario")
		return nil
	}
	return doc.Content[0]
}

// resolve follows aliases and counts the node; nil when the walk stopped.
func (w *walker) resolve(n *yaml.Node) *yaml.Node {
	for i := 0; n != nil && n.Kind == yaml.AliasNode; i++ {
		if i > 100 {
			w.errorf(n, "", "alias that leads nowhere")
			return nil
		}
		n = n.Alias
	}
	if n == nil || w.stopped {
		return nil
	}
	w.nodes++
	if w.nodes > maxNodes {
		w.errorf(n, "", "more than %d YAML nodes; stopped", maxNodes)
		w.stopped = true
		return nil
	}
	return n
}

// entry is one key of a mapping, with the key's node and the value's.
type entry struct {
	key  string
	k, v *yaml.Node
}

// entries returns the keys of a mapping; repeated and non-scalar keys are
// errors and left out.
func (w *walker) entries(n *yaml.Node, path string) ([]entry, bool) {
	if n = w.resolve(n); n == nil {
		return nil, false
	}
	if n.Kind != yaml.MappingNode {
		w.errorf(n, path, "want a mapping, got %s", config.DescribeNode(n))
		return nil, false
	}
	var out []entry
	seen := map[string]int{}
	for i := 0; i+1 < len(n.Content); i += 2 {
		k, v := w.resolve(n.Content[i]), w.resolve(n.Content[i+1])
		if k == nil || v == nil {
			return nil, false
		}
		if k.Kind != yaml.ScalarNode || k.Tag == "!!merge" {
			w.errorf(k, path, "unsupported key %s (merge keys and complex keys are not allowed)", config.DescribeNode(k))
			continue
		}
		if line, dup := seen[k.Value]; dup {
			w.errorf(k, join(path, k.Value), "repeated key (first given at line %d)", line)
			continue
		}
		seen[k.Value] = k.Line
		out = append(out, entry{k.Value, k, v})
	}
	return out, true
}

func join(path, key string) string {
	if path == "" {
		return key
	}
	return path + "." + key
}

func (w *walker) str(n *yaml.Node, path string) (string, bool) {
	if n.Kind != yaml.ScalarNode || n.Tag != "!!str" {
		w.errorf(n, path, "want a name, got %s", config.DescribeNode(n))
		return "", false
	}
	return n.Value, true
}

func (w *walker) number(n *yaml.Node, path string) (float64, bool) {
	if n.Kind != yaml.ScalarNode || (n.Tag != "!!int" && n.Tag != "!!float") {
		w.errorf(n, path, "want a number, got %s", config.DescribeNode(n))
		return 0, false
	}
	var v float64
	if err := n.Decode(&v); err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
		w.errorf(n, path, "want a finite number, got %q", n.Value)
		return 0, false
	}
	return v, true
}

func (w *walker) integer(n *yaml.Node, path string) (int, bool) {
	var v int
	if n.Kind != yaml.ScalarNode || n.Tag != "!!int" || n.Decode(&v) != nil {
		w.errorf(n, path, "want a whole number, got %s", config.DescribeNode(n))
		return 0, false
	}
	return v, true
}

func (w *walker) boolean(n *yaml.Node, path string) (bool, bool) {
	var v bool
	if n.Kind != yaml.ScalarNode || n.Tag != "!!bool" || n.Decode(&v) != nil {
		w.errorf(n, path, "want true or false, got %s", config.DescribeNode(n))
		return false, false
	}
	return v, true
}

// maxDuration bounds every duration of a scenario (a year), so that sums of
// them cannot overflow.
const maxDuration = 366 * 24 * time.Hour

func (w *walker) duration(n *yaml.Node, path string) (time.Duration, bool) {
	if n.Kind != yaml.ScalarNode || n.Tag != "!!str" {
		w.errorf(n, path, "want a duration with its unit, such as 500ms or 2s, got %s", config.DescribeNode(n))
		return 0, false
	}
	d, err := time.ParseDuration(n.Value)
	if err != nil {
		w.errorf(n, path, "want a duration with its unit, such as 500ms or 2s, got %q", n.Value)
		return 0, false
	}
	if d > maxDuration || d < -maxDuration {
		w.errorf(n, path, "%v is longer than a scenario may be (%v)", d, maxDuration)
		return 0, false
	}
	return d, true
}

// fieldsOf lists the fields each kind of event takes besides `at` and its
// kind key, the required ones first.
var fieldsOf = [numKinds]struct{ required, optional []string }{
	Step:    {[]string{"value"}, nil},
	PRBS:    {[]string{"low", "high", "hold", "for"}, nil},
	Dropout: {[]string{"for"}, nil},
	Bias:    {[]string{"value"}, []string{"for"}},
	Spikes:  {[]string{"value"}, []string{"count", "every"}},
	Slow:    {[]string{"ticks", "for"}, nil},
	Jitter:  {[]string{"max", "for"}, nil},
}

// scenario walks the file.
func (w *walker) scenario(data []byte, plant *config.Plant) (*Scenario, positions) {
	pos := positions{scenario: map[string]*yaml.Node{}}
	root := w.document(data)
	if root == nil {
		return nil, pos
	}
	es, ok := w.entries(root, "")
	if !ok {
		return nil, pos
	}
	sc := &Scenario{}
	lengthGiven := false
	var events *yaml.Node
	for _, e := range es {
		pos.scenario[e.key] = e.v
		switch e.key {
		case "name":
			sc.Name, _ = w.str(e.v, e.key)
		case "length":
			sc.Length, _ = w.duration(e.v, e.key)
			lengthGiven = true
		case "repeat":
			sc.Repeat, _ = w.boolean(e.v, e.key)
		case "events":
			events = e.v
		default:
			w.errorf(e.k, e.key, "unknown key (known keys here: name, length, repeat, events)")
		}
	}
	if events == nil {
		w.errorf(root, "events", "required key is missing")
		return sc, pos
	}
	if events.Kind != yaml.SequenceNode {
		w.errorf(events, "events", "want a list of events, got %s", config.DescribeNode(events))
		return sc, pos
	}
	if len(events.Content) > maxEvents {
		w.errorf(events, "events", "%d events: a scenario has at most %d", len(events.Content), maxEvents)
		return sc, pos
	}
	for i, n := range events.Content {
		ev, at := w.event(n, fmt.Sprintf("events[%d]", i))
		sc.Events = append(sc.Events, ev)
		pos.events = append(pos.events, at)
	}
	if !lengthGiven {
		ts := seconds(plant.Model.Ts)
		for i := range sc.Events {
			ev := &sc.Events[i]
			end, _ := ev.end()
			sc.Length = max(sc.Length, end, ev.At+ts)
			if ev.Kind == Spikes {
				sc.Length = max(sc.Length, ev.lastSpike()+ts)
			}
		}
		pos.scenario["length"] = events
	}
	return sc, pos
}

// event walks one event.
func (w *walker) event(n *yaml.Node, path string) (Event, map[string]*yaml.Node) {
	at := map[string]*yaml.Node{"": n}
	ev := Event{Line: n.Line}
	es, ok := w.entries(n, path)
	if !ok {
		return ev, at
	}
	// The kind key first: it decides which other fields are allowed.
	var kindKey *entry
	for i := range es {
		for k := Step; k < numKinds; k++ {
			if es[i].key != k.String() {
				continue
			}
			if kindKey != nil {
				w.errorf(es[i].k, join(path, es[i].key), "an event has one kind; this one is already a %s (line %d)", kindKey.key, kindKey.k.Line)
				continue
			}
			kindKey, ev.Kind = &es[i], k
		}
	}
	if kindKey == nil {
		w.errorf(n, path, "no kind of event: want one of the keys %s", strings.Join(kindNames[1:], ", "))
		return ev, at
	}
	at[kindKey.key] = kindKey.v
	ev.Signal, _ = w.str(kindKey.v, join(path, kindKey.key))
	f := fieldsOf[ev.Kind]
	allowed := append([]string{"at"}, append(slices.Clone(f.required), f.optional...)...)
	given := map[string]bool{}
	for _, e := range es {
		if e.key == kindKey.key {
			continue
		}
		p := join(path, e.key)
		if _, isKind := kindOf(e.key); isKind {
			continue // reported above
		}
		if !slices.Contains(allowed, e.key) {
			w.errorf(e.k, p, "not a field of a %s event (its fields: %s)", ev.Kind, strings.Join(allowed, ", "))
			continue
		}
		given[e.key] = true
		at[e.key] = e.v
		switch e.key {
		case "at":
			ev.At, _ = w.duration(e.v, p)
		case "for":
			ev.For, _ = w.duration(e.v, p)
		case "hold":
			ev.Hold, _ = w.duration(e.v, p)
		case "every":
			ev.Every, _ = w.duration(e.v, p)
		case "max":
			ev.Max, _ = w.duration(e.v, p)
		case "value":
			ev.Value, _ = w.number(e.v, p)
		case "low":
			ev.Low, _ = w.number(e.v, p)
		case "high":
			ev.High, _ = w.number(e.v, p)
		case "count":
			ev.Count, _ = w.integer(e.v, p)
		case "ticks":
			ev.Ticks, _ = w.integer(e.v, p)
		}
	}
	for _, k := range append([]string{"at"}, f.required...) {
		if !given[k] {
			w.errorf(n, join(path, k), "required for a %s event", ev.Kind)
		}
	}
	if ev.Kind == Spikes {
		if !given["count"] {
			ev.Count = 1
		}
		if ev.Count > 1 && !given["every"] {
			w.errorf(n, join(path, "every"), "required for more than one spike")
		}
	}
	return ev, at
}

// kindOf returns the kind whose key is s.
func kindOf(s string) (Kind, bool) {
	for k := Step; k < numKinds; k++ {
		if k.String() == s {
			return k, true
		}
	}
	return 0, false
}
