package config

import (
	"bytes"
	"errors"
	"fmt"
	"io"
	"math"
	"regexp"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"

	"gopkg.in/yaml.v3"
)

// The files are read in two steps. yaml.v3 turns the bytes into a node tree
// (syntax errors, a second document); then a decoder walks that tree with the
// schema written out in plant.go and gains.go. The walk, not reflection,
// checks every key: an unknown or repeated key, a wrong type, a missing
// required key and every semantic rule is reported with the position of its
// node and the dotted path of its field, and all of them are collected before
// the parse gives up. (yaml.v3's own KnownFields applies only when decoding
// into Go structs, reports a line but no column or field path, and stops at
// the first unknown key of each mapping; the walk does not go through it.)

// maxNodes bounds the nodes visited in one file, aliases counted each time
// they are followed, so that a small file of nested aliases cannot make the
// walk run for ever.
const maxNodes = 1 << 20

// maxErrors bounds the errors collected from one file.
const maxErrors = 200

// decoder walks one YAML document and collects its errors.
type decoder struct {
	file  string
	errs  []FieldError
	nodes int
	// stopped is set when the walk gave up (too many nodes or errors);
	// the remaining calls do nothing.
	stopped bool
}

func (d *decoder) errorf(n *yaml.Node, field, format string, args ...any) {
	if d.stopped {
		return
	}
	e := FieldError{File: d.file, Field: field, Msg: fmt.Sprintf(format, args...)}
	if n != nil {
		e.Line, e.Column = n.Line, n.Column
	}
	d.errs = append(d.errs, e)
	if len(d.errs) >= maxErrors {
		d.errs = append(d.errs, FieldError{File: d.file, Msg: fmt.Sprintf("more than %d errors; stopped", maxErrors)})
		d.stopped = true
	}
}

// err returns the collected errors as an *ErrorList, or nil.
func (d *decoder) err() error {
	if len(d.errs) == 0 {
		return nil
	}
	errs := append([]FieldError(nil), d.errs...)
	sortErrors(errs)
	return &ErrorList{Errors: errs}
}

var yamlLine = regexp.MustCompile(`^yaml: line (\d+): (.*)$`)

// syntax records an error from the YAML parser, with its line when it names one.
func (d *decoder) syntax(err error) {
	msg := err.Error()
	if m := yamlLine.FindStringSubmatch(msg); m != nil {
		line, _ := strconv.Atoi(m[1])
		d.errs = append(d.errs, FieldError{File: d.file, Line: line, Msg: "YAML syntax: " + m[2]})
		return
	}
	d.errs = append(d.errs, FieldError{File: d.file, Msg: "YAML: " + strings.TrimPrefix(msg, "yaml: ")})
}

// document parses data as exactly one YAML document and returns its root
// node, or nil after recording why it cannot.
func (d *decoder) document(data []byte, what string) *yaml.Node {
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var doc yaml.Node
	if err := dec.Decode(&doc); err != nil {
		if errors.Is(err, io.EOF) {
			d.errs = append(d.errs, FieldError{File: d.file, Msg: "empty document: want a " + what})
		} else {
			d.syntax(err)
		}
		return nil
	}
	var extra yaml.Node
	switch err := dec.Decode(&extra); {
	case errors.Is(err, io.EOF):
	case err != nil:
		d.syntax(err)
	default:
		d.errorf(&extra, "", "a second YAML document: a %s file holds exactly one", what)
	}
	if doc.Kind != yaml.DocumentNode || len(doc.Content) != 1 {
		d.errorf(&doc, "", "empty document: want a %s", what)
		return nil
	}
	root := doc.Content[0]
	if root.Kind == yaml.ScalarNode && root.Tag == "!!null" {
		d.errorf(root, "", "empty document: want a %s", what)
		return nil
	}
	if root.Kind != yaml.MappingNode {
		msg := fmt.Sprintf("not a %s file: want a YAML mapping of keys, got %s", what, DescribeNode(root))
		if looksLikeCSV(data) {
			msg = fmt.Sprintf("not a %s file: this looks like a CSV file (a recording for surmise replay --data?)", what)
		}
		d.errorf(root, "", "%s", msg)
		return nil
	}
	if other, hint := otherKind(root, what); other != "" {
		d.errorf(root, "", "this is a %s file, not a %s file: %s", other, what, hint)
		return nil
	}
	return root
}

// looksLikeCSV reports whether data starts like comma- or semicolon-separated
// values: a first line with separators and no YAML "key: value".
func looksLikeCSV(data []byte) bool {
	line, _, _ := bytes.Cut(data, []byte("\n"))
	return (bytes.Count(line, []byte(",")) >= 2 || bytes.Count(line, []byte(";")) >= 2) && !bytes.Contains(line, []byte(": "))
}

// otherKind recognises a gains file given where a plant file is wanted and
// the reverse, by their required top-level keys, and says what to give
// instead; "" when root is not the other kind.
func otherKind(root *yaml.Node, what string) (other, hint string) {
	keys := map[string]bool{}
	for i := 0; i+1 < len(root.Content); i += 2 {
		keys[root.Content[i].Value] = true
	}
	switch {
	case what == "plant" && keys["sets"] && keys["fingerprint"] && !keys["model"]:
		return "gains", "give the plant file (its gains: key names this gains file)"
	case what == "gains" && keys["model"] && keys["states"] && !keys["sets"]:
		return "plant", "give the gains file the plant file's gains: key names (write one with surmise design)"
	}
	return "", ""
}

// resolve follows aliases and counts the node against the budget; it returns
// nil when the walk has stopped.
func (d *decoder) resolve(n *yaml.Node) *yaml.Node {
	if d.stopped || n == nil {
		return nil
	}
	for i := 0; n.Kind == yaml.AliasNode; i++ {
		if n.Alias == nil || i > 100 {
			d.errorf(n, "", "alias that leads nowhere")
			return nil
		}
		n = n.Alias
	}
	d.nodes++
	if d.nodes > maxNodes {
		d.errorf(n, "", "more than %d YAML nodes (aliases counted each time they are used); stopped", maxNodes)
		d.stopped = true
		return nil
	}
	return n
}

// DescribeNode names the kind and value of a YAML node for an error message
// ("a mapping", "the number 3", a quoted string). Other strict parsers of
// the project (scenario files) use it so that their messages read alike.
func DescribeNode(n *yaml.Node) string {
	switch n.Kind {
	case yaml.MappingNode:
		return "a mapping"
	case yaml.SequenceNode:
		return "a list"
	case yaml.ScalarNode:
		switch n.Tag {
		case "!!null":
			return "nothing (null)"
		case "!!int", "!!float":
			return "the number " + n.Value
		case "!!bool":
			return "the boolean " + n.Value
		case "!!str":
			if len(n.Value) > 60 {
				cut := 48
				for cut > 0 && !utf8.RuneStart(n.Value[cut]) {
					cut--
				}
				return fmt.Sprintf("%s… (a text of %d bytes)", strconv.Quote(n.Value[:cut]), len(n.Value))
			}
			return strconv.Quote(n.Value)
		}
		return fmt.Sprintf("%s %q", n.Tag, n.Value)
	}
	return "an unexpected YAML node"
}

func isNull(n *yaml.Node) bool {
	return n.Kind == yaml.ScalarNode && n.Tag == "!!null"
}

func join(path, key string) string {
	if path == "" {
		return key
	}
	return path + "." + key
}

func index(path string, i int) string {
	return fmt.Sprintf("%s[%d]", path, i)
}

// field is one key of a mapping in the schema.
type field struct {
	key      string
	required bool
	// set is called with the value node (aliases resolved) and its path.
	// A null value of an optional key counts as absent and is not passed on.
	set func(v *yaml.Node, path string)
}

// mapping walks a mapping node with the given schema: unknown, repeated and
// missing keys are errors. It reports whether n was a mapping.
func (d *decoder) mapping(n *yaml.Node, path string, fields []field) bool {
	if n = d.resolve(n); n == nil {
		return false
	}
	if n.Kind != yaml.MappingNode {
		d.errorf(n, path, "want a mapping, got %s", DescribeNode(n))
		return false
	}
	seen := make(map[string]*yaml.Node, len(fields))
	for i := 0; i+1 < len(n.Content); i += 2 {
		k := d.resolve(n.Content[i])
		v := d.resolve(n.Content[i+1])
		if k == nil || v == nil {
			return true
		}
		if k.Kind != yaml.ScalarNode || k.Tag == "!!merge" {
			d.errorf(k, path, "unsupported key %s (merge keys and complex keys are not allowed)", DescribeNode(k))
			continue
		}
		key := k.Value
		var f *field
		for j := range fields {
			if fields[j].key == key {
				f = &fields[j]
				break
			}
		}
		if f == nil {
			known := make([]string, len(fields))
			for j := range fields {
				known[j] = fields[j].key
			}
			d.errorf(k, join(path, key), "unknown key (known keys here: %s)", strings.Join(known, ", "))
			continue
		}
		if first, dup := seen[key]; dup {
			d.errorf(k, join(path, key), "repeated key (first given at line %d)", first.Line)
			continue
		}
		seen[key] = k
		if isNull(v) {
			if f.required {
				d.errorf(v, join(path, key), "required, but given no value")
			}
			continue
		}
		f.set(v, join(path, key))
	}
	for _, f := range fields {
		if _, ok := seen[f.key]; f.required && !ok {
			d.errorf(n, join(path, f.key), "required key is missing")
		}
	}
	return true
}

// sequence returns the items of a list node (aliases resolved), or false after
// recording an error.
func (d *decoder) sequence(n *yaml.Node, path string) ([]*yaml.Node, bool) {
	if n = d.resolve(n); n == nil {
		return nil, false
	}
	if n.Kind != yaml.SequenceNode {
		d.errorf(n, path, "want a list, got %s", DescribeNode(n))
		return nil, false
	}
	items := make([]*yaml.Node, 0, len(n.Content))
	for _, it := range n.Content {
		it = d.resolve(it)
		if it == nil {
			return nil, false
		}
		items = append(items, it)
	}
	return items, true
}

// str decodes a string scalar.
func (d *decoder) str(n *yaml.Node, path string) (string, bool) {
	if n.Kind != yaml.ScalarNode || n.Tag != "!!str" {
		d.errorf(n, path, "want a string, got %s (quote it if it is meant as text)", DescribeNode(n))
		return "", false
	}
	return n.Value, true
}

// number decodes a finite number.
func (d *decoder) number(n *yaml.Node, path string) (float64, bool) {
	if n.Kind != yaml.ScalarNode || (n.Tag != "!!int" && n.Tag != "!!float") {
		d.errorf(n, path, "want a number, got %s", DescribeNode(n))
		return 0, false
	}
	var v float64
	if err := n.Decode(&v); err != nil {
		d.errorf(n, path, "want a number, got %q", n.Value)
		return 0, false
	}
	if math.IsNaN(v) || math.IsInf(v, 0) {
		d.errorf(n, path, "%s is not a finite number", n.Value)
		return 0, false
	}
	return v, true
}

// integer decodes a whole number.
func (d *decoder) integer(n *yaml.Node, path string) (int, bool) {
	if n.Kind != yaml.ScalarNode || n.Tag != "!!int" {
		d.errorf(n, path, "want a whole number, got %s", DescribeNode(n))
		return 0, false
	}
	var v int
	if err := n.Decode(&v); err != nil {
		d.errorf(n, path, "want a whole number, got %q", n.Value)
		return 0, false
	}
	return v, true
}

// duration decodes a Go duration string such as "500ms", "1s" or "1m30s".
func (d *decoder) duration(n *yaml.Node, path string) (time.Duration, bool) {
	if n.Kind != yaml.ScalarNode || n.Tag != "!!str" {
		d.errorf(n, path, "want a duration with its unit, such as 500ms or 2s, got %s", DescribeNode(n))
		return 0, false
	}
	v, err := time.ParseDuration(n.Value)
	if err != nil {
		d.errorf(n, path, "want a duration with its unit, such as 500ms or 2s, got %q", n.Value)
		return 0, false
	}
	return v, true
}

// vector decodes a list of finite numbers.
func (d *decoder) vector(n *yaml.Node, path string) ([]float64, bool) {
	items, ok := d.sequence(n, path)
	if !ok {
		return nil, false
	}
	v := make([]float64, len(items))
	for i, it := range items {
		x, good := d.number(it, index(path, i))
		ok = ok && good
		v[i] = x
	}
	return v, ok
}

// matrix is a matrix read from a list of rows, with the nodes for later errors.
type matrix struct {
	node *yaml.Node
	rows [][]float64
	ok   bool // every entry a finite number and every row the same length
}

func (m *matrix) dims() (r, c int) {
	if len(m.rows) == 0 {
		return 0, 0
	}
	return len(m.rows), len(m.rows[0])
}

// matrix decodes a non-empty list of rows of equal length.
func (d *decoder) matrix(n *yaml.Node, path string) *matrix {
	m := &matrix{node: n}
	items, ok := d.sequence(n, path)
	if !ok {
		return m
	}
	if len(items) == 0 {
		d.errorf(n, path, "empty matrix: want a list of rows, each a list of numbers")
		return m
	}
	m.ok = true
	for i, it := range items {
		row, good := d.vector(it, index(path, i))
		m.ok = m.ok && good
		if good && len(row) == 0 {
			d.errorf(it, index(path, i), "empty row")
			m.ok = false
		}
		if good && i > 0 && len(m.rows[0]) > 0 && len(row) != len(m.rows[0]) {
			d.errorf(it, index(path, i), "row of %d, but row 0 has %d numbers", len(row), len(m.rows[0]))
			m.ok = false
		}
		m.rows = append(m.rows, row)
	}
	return m
}

// shape checks that a well-formed matrix is r×c, naming what its rows and
// columns stand for.
func (d *decoder) shape(m *matrix, path string, r int, rowsFor string, c int, colsFor string) bool {
	if m == nil || !m.ok {
		return false
	}
	mr, mc := m.dims()
	if mr != r || mc != c {
		d.errorf(m.node, path, "%d×%d, want %d×%d (%s by %s)", mr, mc, r, c, rowsFor, colsFor)
		return false
	}
	return true
}
