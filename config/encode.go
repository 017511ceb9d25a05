package config

import (
	"bytes"
	"fmt"
	"math"
	"strconv"
	"time"

	"gonum.org/v1/gonum/mat"
	"gopkg.in/yaml.v3"

	"surmise/estimator"
)

// EncodeGains writes g as a gains file. The output is deterministic: keys in
// a fixed order, sets and gains in the order of g, every number with the
// fewest digits that read back to the same float64 (strconv 'g', -1), so that
// ParseGains returns exactly the matrices that were encoded. A header comment
// says that surmise design wrote it and for which plant. g.Outputs must name
// the plant's outputs (NewGainsFile fills them in). EncodeGains checks what
// it needs to write a file that parses (every set named, with a known form,
// finite numbers, patterns within the outputs); ParseGains checks the rest.
func EncodeGains(g *GainsFile) ([]byte, error) {
	e := encoder{g: g}
	root := e.mapping()
	head := "Gain sets written by surmise design"
	if g.Plant != "" {
		head += fmt.Sprintf(" for the plant %q", g.Plant)
	}
	root.HeadComment = head + ".\nThe fingerprint ties them to one discrete model; surmise refuses them for any other.\nHand edits are read, and checked, like the rest of the file."
	e.add(root, "fingerprint", e.str(g.Fingerprint))
	if g.Plant != "" {
		e.add(root, "plant", e.str(g.Plant))
	}
	e.add(root, "active", e.str(g.Active))
	if g.Candidate != "" {
		e.add(root, "candidate", e.str(g.Candidate))
	}
	sets := &yaml.Node{Kind: yaml.SequenceNode}
	for i, ns := range g.Sets {
		sets.Content = append(sets.Content, e.set(i, ns))
	}
	e.add(root, "sets", sets)
	if e.err != nil {
		return nil, fmt.Errorf("config: encode gains: %w", e.err)
	}
	var buf bytes.Buffer
	enc := yaml.NewEncoder(&buf)
	enc.SetIndent(2)
	if err := enc.Encode(root); err != nil {
		return nil, fmt.Errorf("config: encode gains: %w", err)
	}
	if err := enc.Close(); err != nil {
		return nil, fmt.Errorf("config: encode gains: %w", err)
	}
	return buf.Bytes(), nil
}

type encoder struct {
	g   *GainsFile
	err error // the first problem found
}

func (e *encoder) fail(format string, args ...any) {
	if e.err == nil {
		e.err = fmt.Errorf(format, args...)
	}
}

func (e *encoder) mapping() *yaml.Node { return &yaml.Node{Kind: yaml.MappingNode} }

func (e *encoder) add(m *yaml.Node, key string, v *yaml.Node) {
	m.Content = append(m.Content, &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Value: key}, v)
}

// str is a string scalar; the YAML encoder quotes it when it would otherwise
// read back as something else.
func (e *encoder) str(s string) *yaml.Node {
	return &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Value: s}
}

func (e *encoder) number(v float64, what string) *yaml.Node {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		e.fail("%s: %v is not a finite number", what, v)
	}
	// No tag: the plain scalar reads back as !!int or !!float, both numbers.
	return &yaml.Node{Kind: yaml.ScalarNode, Value: strconv.FormatFloat(v, 'g', -1, 64)}
}

// matrix writes a list of rows, each row in flow style: [1, 2.5].
func (e *encoder) matrix(m mat.Matrix, what string) *yaml.Node {
	rows := &yaml.Node{Kind: yaml.SequenceNode}
	r, c := m.Dims()
	for i := 0; i < r; i++ {
		row := &yaml.Node{Kind: yaml.SequenceNode, Style: yaml.FlowStyle}
		for j := 0; j < c; j++ {
			row.Content = append(row.Content, e.number(m.At(i, j), what))
		}
		rows.Content = append(rows.Content, row)
	}
	return rows
}

func (e *encoder) poles(ps []complex128, what string) *yaml.Node {
	seq := &yaml.Node{Kind: yaml.SequenceNode, Style: yaml.FlowStyle}
	for _, p := range ps {
		if math.IsNaN(real(p)) || math.IsNaN(imag(p)) || math.IsInf(real(p), 0) || math.IsInf(imag(p), 0) {
			e.fail("%s: pole %v is not finite", what, p)
		}
		seq.Content = append(seq.Content, &yaml.Node{Kind: yaml.ScalarNode, Tag: "!!str", Style: yaml.DoubleQuotedStyle, Value: formatPole(p)})
	}
	return seq
}

func (e *encoder) set(i int, ns NamedSet) *yaml.Node {
	m := e.mapping()
	s := ns.Set
	what := fmt.Sprintf("sets[%d]", i)
	if s == nil {
		e.fail("%s: no gain set", what)
		return m
	}
	if s.Name == "" {
		e.fail("%s: no name", what)
	}
	if _, ok := estimator.ParseForm(s.Form.String()); !ok {
		e.fail("%s: unknown form %d", what, int(s.Form))
	}
	e.add(m, "name", e.str(s.Name))
	e.add(m, "form", e.str(s.Form.String()))
	if s.Form == estimator.Kalman {
		if s.Q == nil || s.R == nil {
			e.fail("%s: a kalman set needs Q and R", what)
		} else {
			e.add(m, "Q", e.matrix(s.Q, what+".Q"))
			e.add(m, "R", e.matrix(s.R, what+".R"))
		}
	} else {
		gains := &yaml.Node{Kind: yaml.SequenceNode}
		for j, pg := range s.Gains {
			gains.Content = append(gains.Content, e.gain(pg, fmt.Sprintf("%s.gains[%d]", what, j)))
		}
		e.add(m, "gains", gains)
	}
	e.add(m, "provenance", e.provenance(ns.Provenance, what+".provenance"))
	return m
}

func (e *encoder) gain(pg estimator.PatternGain, what string) *yaml.Node {
	m := e.mapping()
	outs := &yaml.Node{Kind: yaml.SequenceNode, Style: yaml.FlowStyle}
	for _, i := range pg.Outputs.Indices(nil) {
		if i >= len(e.g.Outputs) {
			e.fail("%s: output %d in the pattern, but the file names %d outputs", what, i, len(e.g.Outputs))
			continue
		}
		outs.Content = append(outs.Content, e.str(e.g.Outputs[i]))
	}
	e.add(m, "outputs", outs)
	if pg.L == nil {
		e.fail("%s: no L", what)
	} else {
		e.add(m, "L", e.matrix(pg.L, what+".L"))
	}
	if pg.S != nil {
		e.add(m, "S", e.matrix(pg.S, what+".S"))
	}
	if pg.P != nil {
		e.add(m, "P", e.matrix(pg.P, what+".P"))
	}
	if pg.Poles != nil {
		e.add(m, "poles", e.poles(pg.Poles, what+".poles"))
	}
	return m
}

func (e *encoder) provenance(pv Provenance, what string) *yaml.Node {
	m := e.mapping()
	e.add(m, "method", e.str(pv.Method))
	if pv.Poles != nil {
		e.add(m, "poles", e.poles(pv.Poles, what+".poles"))
	}
	if pv.Q != nil {
		e.add(m, "Q", e.matrix(pv.Q, what+".Q"))
	}
	if pv.R != nil {
		e.add(m, "R", e.matrix(pv.R, what+".R"))
	}
	if pv.Factor != 0 {
		e.add(m, "factor", e.number(pv.Factor, what+".factor"))
	}
	if !pv.Created.IsZero() {
		e.add(m, "created", e.str(pv.Created.Format(time.RFC3339Nano)))
	}
	if pv.Tool != "" {
		e.add(m, "tool", e.str(pv.Tool))
	}
	if pv.Note != "" {
		e.add(m, "note", e.str(pv.Note))
	}
	return m
}
