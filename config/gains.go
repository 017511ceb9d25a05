package config

import (
	"fmt"
	"math"
	"math/cmplx"
	"os"
	"regexp"
	"strconv"
	"strings"
	"time"

	"gonum.org/v1/gonum/mat"
	"gopkg.in/yaml.v3"

	"surmise/estimator"
)

// GainsFile is a validated gains file: named gain sets for one discrete model.
type GainsFile struct {
	// Fingerprint is the Fingerprint of the model the sets were designed for
	// (key `fingerprint`, required); ParseGains refuses a file whose
	// fingerprint is not the plant model's.
	Fingerprint string
	// Plant is the name of the plant the file was written for (key `plant`,
	// optional). It is informative: the fingerprint decides.
	Plant string
	// Outputs are the plant's output names in order; they name the outputs
	// of each pattern in the file. ParseGains fills them from the plant.
	Outputs []string
	// Active is the name of the set the estimator runs (key `active`,
	// required); Candidate the set run in shadow (key `candidate`, optional,
	// "" for none).
	Active, Candidate string
	// Sets are the gain sets, in file order (key `sets`, at least one).
	Sets []NamedSet
}

// NamedSet is one gain set with the record of how it was designed. Its name
// is Set.Name.
type NamedSet struct {
	Set        *estimator.GainSet
	Provenance Provenance
}

// Provenance records how a gain set was obtained (key `provenance` of a set).
type Provenance struct {
	// Method is how the set was designed, a short word such as "poles"
	// (pole placement), "kalman" or "rule-of-thumb" (key `method`,
	// required). Files written before the word "poles" say "place": that
	// is read as "poles".
	Method string
	// Poles are the error-dynamics eigenvalues that were requested (key
	// `poles`, optional), written like the achieved poles of a gain.
	Poles []complex128
	// Q and R are the noise covariances a Kalman design used (keys `Q`, `R`,
	// optional, n×n and p×p).
	Q, R *mat.SymDense
	// Factor is a design factor such as the speed-up of observer poles over
	// the plant's (key `factor`, optional, 0 when absent).
	Factor float64
	// Created is when the set was designed (key `created`, RFC 3339,
	// optional, zero when absent).
	Created time.Time
	// Tool is the program and version that wrote the set (key `tool`).
	Tool string
	// Note is free text (key `note`).
	Note string
}

// setName is the rule for the name of a gain set: it is the `gains` metric
// label value.
var setName = regexp.MustCompile(`^[A-Za-z0-9][A-Za-z0-9_.-]{0,62}$`)

// NewGainsFile returns an empty gains file for the plant's model: its
// fingerprint, name and output names filled in.
func NewGainsFile(plant *Plant) *GainsFile {
	g := &GainsFile{Fingerprint: Fingerprint(plant.Model), Plant: plant.Name}
	for _, s := range plant.Model.Outputs {
		g.Outputs = append(g.Outputs, s.Name)
	}
	return g
}

// Set returns the set with the given name, or nil.
func (g *GainsFile) Set(name string) *NamedSet {
	for i := range g.Sets {
		if g.Sets[i].Set.Name == name {
			return &g.Sets[i]
		}
	}
	return nil
}

// LoadGains reads and parses a gains file for the plant.
func LoadGains(path string, plant *Plant) (*GainsFile, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("cannot read the gains file: %w", err)
	}
	return ParseGains(path, data, plant)
}

// ParseGains parses and validates the gains file data for the plant's model;
// filename is used in error messages. It refuses a file designed for a
// different model (its fingerprint is not Fingerprint(plant.Model)), wrong
// dimensions, non-finite numbers, unknown output names, repeated set names, an
// active or candidate set that is not in the file, covariances that are not
// symmetric positive (semi)definite, and sets that estimator.Prepare refuses
// with the plant's gate (among them, fixed gains whose error dynamics are not
// inside the unit circle). On failure the error is an *ErrorList holding every
// problem found. plant must not be nil.
func ParseGains(filename string, data []byte, plant *Plant) (*GainsFile, error) {
	d := &decoder{file: filename}
	root := d.document(data, "gains")
	if root == nil {
		return nil, d.err()
	}
	g := NewGainsFile(plant)
	gw := gainsWalker{d: d, model: plant.Model, gate: plant.Gate, file: g}
	gw.walk(root)
	if err := d.err(); err != nil {
		return nil, err
	}
	return g, nil
}

type gainsWalker struct {
	d     *decoder
	model *estimator.Model
	gate  float64
	file  *GainsFile
}

func (w *gainsWalker) walk(root *yaml.Node) {
	d, g := w.d, w.file
	want := g.Fingerprint
	var activeNode, candNode *yaml.Node
	setNodes := map[string]*yaml.Node{}
	d.mapping(root, "", []field{
		{"fingerprint", true, func(v *yaml.Node, p string) {
			if s, ok := d.str(v, p); ok && s != want {
				d.errorf(v, p, "%s does not match the plant's model %s: these gains were designed for a different model (rerun surmise design)", s, want)
			}
		}},
		{"plant", false, func(v *yaml.Node, p string) { g.Plant, _ = d.str(v, p) }},
		{"active", true, func(v *yaml.Node, p string) {
			if s, ok := d.str(v, p); ok {
				g.Active, activeNode = s, v
			}
		}},
		{"candidate", false, func(v *yaml.Node, p string) {
			if s, ok := d.str(v, p); ok {
				g.Candidate, candNode = s, v
			}
		}},
		{"sets", true, func(v *yaml.Node, p string) {
			items, ok := d.sequence(v, p)
			if !ok {
				return
			}
			if len(items) == 0 {
				d.errorf(v, p, "empty list: want at least one gain set")
			}
			for i, it := range items {
				ns, nameNode := w.set(it, index(p, i))
				if ns == nil {
					continue
				}
				if nameNode != nil {
					if first, dup := setNodes[ns.Set.Name]; dup {
						d.errorf(nameNode, join(index(p, i), "name"), "duplicate set name %q (also at line %d)", ns.Set.Name, first.Line)
					}
					setNodes[ns.Set.Name] = nameNode
				}
				g.Sets = append(g.Sets, *ns)
			}
		}},
	})
	if activeNode != nil && setNodes[g.Active] == nil {
		d.errorf(activeNode, "active", "no set named %q in this file", g.Active)
	}
	if candNode != nil {
		switch {
		case setNodes[g.Candidate] == nil:
			d.errorf(candNode, "candidate", "no set named %q in this file", g.Candidate)
		case g.Candidate == g.Active:
			d.errorf(candNode, "candidate", "%q is already the active set", g.Candidate)
		}
	}
}

// set walks one gain set; it returns nil when the node is not a mapping.
func (w *gainsWalker) set(v *yaml.Node, path string) (*NamedSet, *yaml.Node) {
	d, md := w.d, w.model
	n, _, p := md.Dims()
	ns := &NamedSet{Set: &estimator.GainSet{}}
	before := len(d.errs)
	var nameNode, gainsNode, qNode, rNode *yaml.Node
	var gainNodes []*yaml.Node
	var q, r *matrix
	ok := d.mapping(v, path, []field{
		{"name", true, func(v *yaml.Node, p string) {
			if s, ok := d.str(v, p); ok {
				ns.Set.Name, nameNode = s, v
				if !setName.MatchString(s) {
					d.errorf(v, p, "%q is not a valid set name: want letters, digits, '.', '-' or '_', starting with a letter or digit (at most 63)", s)
				}
			}
		}},
		{"form", true, func(v *yaml.Node, p string) {
			if s, ok := d.str(v, p); ok {
				f, known := estimator.ParseForm(s)
				if !known {
					d.errorf(v, p, "unknown form %q: want prediction, current or kalman", s)
				}
				ns.Set.Form = f
			}
		}},
		{"gains", false, func(v *yaml.Node, p string) {
			gainsNode = v
			gainNodes, _ = d.sequence(v, p)
		}},
		{"Q", false, func(v *yaml.Node, p string) { qNode, q = v, d.matrix(v, p) }},
		{"R", false, func(v *yaml.Node, p string) { rNode, r = v, d.matrix(v, p) }},
		{"provenance", true, func(v *yaml.Node, p string) { ns.Provenance = w.provenance(v, p) }},
	})
	if !ok {
		return nil, nil
	}
	switch ns.Set.Form {
	case estimator.Prediction, estimator.Current:
		if gainsNode == nil {
			d.errorf(v, join(path, "gains"), "required for the %s form", ns.Set.Form)
		} else if len(gainNodes) == 0 && gainsNode.Kind == yaml.SequenceNode {
			d.errorf(gainsNode, join(path, "gains"), "empty list: want at least the gain for all outputs")
		}
		for _, nd := range []*yaml.Node{qNode, rNode} {
			if nd != nil {
				d.errorf(nd, path, "Q and R belong to a kalman set; the noise a design used goes under provenance")
			}
		}
		w.gains(ns.Set, gainNodes, join(path, "gains"))
	case estimator.Kalman:
		if gainsNode != nil {
			d.errorf(gainsNode, join(path, "gains"), "a kalman set computes its gains every tick: give Q and R, not fixed gains")
		}
		if qNode == nil {
			d.errorf(v, join(path, "Q"), "required for the kalman form")
		}
		if rNode == nil {
			d.errorf(v, join(path, "R"), "required for the kalman form")
		}
		ns.Set.Q = w.cov(q, join(path, "Q"), n, "states", false)
		ns.Set.R = w.cov(r, join(path, "R"), p, "outputs", true)
	}
	if len(d.errs) == before && ns.Set.Form != 0 {
		// The rules the engine applies (among them: the error dynamics of
		// every fixed gain inside the unit circle) are estimator.Prepare's;
		// the file is checked by the same code that will run it.
		if _, err := estimator.Prepare(md, ns.Set, w.gate); err != nil {
			d.errorf(v, path, "refused by the estimator (gains counted from 0, the gain for all outputs first): %v", err)
		}
	}
	return ns, nameNode
}

// cov checks a covariance read from the file and returns it, or nil.
func (w *gainsWalker) cov(m *matrix, path string, size int, per string, strict bool) *mat.SymDense {
	if m == nil || !w.d.shape(m, path, size, per, size, per) {
		return nil
	}
	s, msg := covariance(m.rows, strict)
	if msg != "" {
		w.d.errorf(m.node, path, "%s", msg)
	}
	return s
}

// gains walks the per-pattern gains of a fixed-gain set.
func (w *gainsWalker) gains(set *estimator.GainSet, items []*yaml.Node, path string) {
	d, md := w.d, w.model
	n, _, p := md.Dims()
	full := estimator.FullPattern(p)
	patterns := map[estimator.Pattern]*yaml.Node{}
	var fullGain *estimator.PatternGain
	var others []estimator.PatternGain
	for i, it := range items {
		gp := index(path, i)
		var pg estimator.PatternGain
		var outNode *yaml.Node
		var l, s, pm *matrix
		var poles []complex128
		var polesNode *yaml.Node
		patternOK := false
		good := d.mapping(it, gp, []field{
			{"outputs", true, func(v *yaml.Node, fp string) {
				outNode = v
				pg.Outputs, patternOK = w.pattern(v, fp)
			}},
			{"L", true, func(v *yaml.Node, fp string) { l = d.matrix(v, fp) }},
			{"S", false, func(v *yaml.Node, fp string) { s = d.matrix(v, fp) }},
			{"P", false, func(v *yaml.Node, fp string) { pm = d.matrix(v, fp) }},
			{"poles", false, func(v *yaml.Node, fp string) { polesNode = v; poles = w.poles(v, fp) }},
		})
		if !good {
			continue
		}
		if patternOK {
			if first, dup := patterns[pg.Outputs]; dup {
				d.errorf(outNode, join(gp, "outputs"), "a second gain for these outputs (the first is at line %d)", first.Line)
			}
			patterns[pg.Outputs] = outNode
		}
		if polesNode != nil && poles != nil && len(poles) != n {
			d.errorf(polesNode, join(gp, "poles"), "%d poles, want %d (one per state)", len(poles), n)
		}
		pg.Poles = poles
		if !patternOK {
			continue
		}
		k := pg.Outputs.Len()
		if d.shape(l, join(gp, "L"), n, "states", k, "outputs of the pattern") {
			pg.L = dense(l.rows)
		}
		if s != nil {
			pg.S = w.cov(s, join(gp, "S"), k, "outputs of the pattern", true)
		}
		if pm != nil {
			pg.P = w.cov(pm, join(gp, "P"), n, "states", false)
		}
		if pg.Outputs == full && fullGain == nil {
			fullGain = &pg
		} else {
			others = append(others, pg)
		}
	}
	if len(items) > 0 && fullGain == nil && len(patterns) == len(items) {
		d.errorf(items[0], path, "no gain for all outputs (%s): a fixed-gain set needs one", strings.Join(w.file.Outputs, ", "))
	}
	if fullGain != nil {
		set.Gains = append([]estimator.PatternGain{*fullGain}, others...)
	}
}

// pattern reads a list of output names, in the plant's order.
func (w *gainsWalker) pattern(v *yaml.Node, path string) (estimator.Pattern, bool) {
	d := w.d
	items, ok := d.sequence(v, path)
	if !ok {
		return 0, false
	}
	if len(items) == 0 {
		d.errorf(v, path, "empty list: want the names of the outputs the gain was designed with")
		return 0, false
	}
	var pat estimator.Pattern
	last := -1
	for i, it := range items {
		name, good := d.str(it, index(path, i))
		if !good {
			ok = false
			continue
		}
		j := -1
		for k, o := range w.file.Outputs {
			if o == name {
				j = k
			}
		}
		switch {
		case j < 0:
			d.errorf(it, index(path, i), "unknown output %q (the plant's outputs: %s)", name, strings.Join(w.file.Outputs, ", "))
			ok = false
		case pat.Has(j):
			d.errorf(it, index(path, i), "output %q listed twice", name)
			ok = false
		case j < last:
			d.errorf(it, index(path, i), "output %q is out of order: list the outputs in the plant's order (%s), as the columns of L are", name, strings.Join(w.file.Outputs, ", "))
			ok = false
		default:
			pat |= 1 << uint(j)
			last = j
		}
	}
	return pat, ok
}

// poles reads a list of eigenvalues: numbers, or strings such as "0.81" and
// "0.5+0.2i".
func (w *gainsWalker) poles(v *yaml.Node, path string) []complex128 {
	d := w.d
	items, ok := d.sequence(v, path)
	if !ok {
		return nil
	}
	out := make([]complex128, 0, len(items))
	for i, it := range items {
		ip := index(path, i)
		if it.Kind == yaml.ScalarNode && (it.Tag == "!!int" || it.Tag == "!!float") {
			x, good := d.number(it, ip)
			ok = ok && good
			out = append(out, complex(x, 0))
			continue
		}
		if it.Kind != yaml.ScalarNode || it.Tag != "!!str" {
			d.errorf(it, ip, "want a pole such as \"0.81\" or \"0.5+0.2i\", got %s", DescribeNode(it))
			ok = false
			continue
		}
		c, err := strconv.ParseComplex(it.Value, 128)
		if err != nil {
			d.errorf(it, ip, "want a pole such as \"0.81\" or \"0.5+0.2i\", got %q", it.Value)
			ok = false
			continue
		}
		if cmplx.IsNaN(c) || cmplx.IsInf(c) {
			d.errorf(it, ip, "%s is not a finite number", it.Value)
			ok = false
			continue
		}
		out = append(out, c)
	}
	if !ok {
		return nil
	}
	return out
}

// provenance walks the provenance of a set.
func (w *gainsWalker) provenance(v *yaml.Node, path string) Provenance {
	d := w.d
	n, _, p := w.model.Dims()
	var pv Provenance
	var q, r *matrix
	d.mapping(v, path, []field{
		{"method", true, func(v *yaml.Node, fp string) {
			if s, ok := d.str(v, fp); ok {
				if s == "place" {
					s = "poles" // the word earlier versions wrote
				}
				pv.Method = s
				if s == "" {
					d.errorf(v, fp, "empty method")
				}
			}
		}},
		{"poles", false, func(v *yaml.Node, fp string) { pv.Poles = w.poles(v, fp) }},
		{"Q", false, func(v *yaml.Node, fp string) { q = d.matrix(v, fp) }},
		{"R", false, func(v *yaml.Node, fp string) { r = d.matrix(v, fp) }},
		{"factor", false, func(v *yaml.Node, fp string) { pv.Factor, _ = d.number(v, fp) }},
		{"created", false, func(v *yaml.Node, fp string) {
			if v.Kind != yaml.ScalarNode || (v.Tag != "!!str" && v.Tag != "!!timestamp") {
				d.errorf(v, fp, "want an RFC 3339 time such as 2025-06-01T14:03:00Z, got %s", DescribeNode(v))
				return
			}
			t, err := time.Parse(time.RFC3339Nano, v.Value)
			if err != nil {
				d.errorf(v, fp, "want an RFC 3339 time such as 2025-06-01T14:03:00Z, got %q", v.Value)
				return
			}
			pv.Created = t
		}},
		{"tool", false, func(v *yaml.Node, fp string) { pv.Tool, _ = d.str(v, fp) }},
		{"note", false, func(v *yaml.Node, fp string) { pv.Note, _ = d.str(v, fp) }},
	})
	pv.Q = w.cov(q, join(path, "Q"), n, "states", false)
	pv.R = w.cov(r, join(path, "R"), p, "outputs", true)
	return pv
}

// formatPole writes a pole as "0.81" or "0.5+0.2i" (or "0.5-0.2i"), each
// part with the fewest digits that read back to the same float64.
func formatPole(c complex128) string {
	re := strconv.FormatFloat(real(c), 'g', -1, 64)
	im := imag(c)
	if im == 0 {
		return re
	}
	sign := "+"
	if im < 0 || math.Signbit(im) {
		sign = "-"
	}
	return re + sign + strconv.FormatFloat(math.Abs(im), 'g', -1, 64) + "i"
}
