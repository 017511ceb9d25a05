package config

import (
	"fmt"
	"math"
	"os"
	"path/filepath"
	"time"

	"gonum.org/v1/gonum/mat"
	"gopkg.in/yaml.v3"

	"surmise/estimator"
)

// Defaults of the optional keys of a plant file.
const (
	// DefaultGate is the gate probability when the file gives none.
	DefaultGate = 0.999
	// DefaultWindow is the windowed-NIS length in ticks when the file gives none.
	DefaultWindow = 100
	// DefaultMaxAgeTicks is the default max_age of a signal, in sample periods.
	DefaultMaxAgeTicks = 3
	// PublishRoot is the first token of the default publish prefix
	// "surmise.<name>".
	PublishRoot = "surmise"
)

// Limits on the size of a plant.
const (
	// MaxStates is the largest number of states a plant file may declare.
	MaxStates = 256
	// MaxInputs is the largest number of inputs a plant file may declare.
	MaxInputs = 64
	// MaxWindow is the longest windowed-NIS length, in ticks.
	MaxWindow = 1_000_000
)

// Plant is a validated plant file: the discrete model one estimator runs, the
// wiring of its signals to the bus and its run-time settings. A Plant is a
// value; nothing changes it after ParsePlant returns it.
type Plant struct {
	// Name is the estimator name (key `name`, required): a lowercase letter,
	// then lowercase letters, digits, '-' and '_', at most 63 bytes. It is a
	// token of bus subjects and the `estimator` metric label.
	Name string
	// Path is the file name the plant was parsed from, as given.
	Path string

	// Model is the discrete-time model the estimator runs: A, B, C, D at
	// sample time Ts (key `model`), Q and R as covariances of one sample
	// (key `noise`), the operating point X0, U0, Y0 (the `nominal` values)
	// and the names and units of states, inputs and outputs.
	Model *estimator.Model
	// Continuous holds the matrices as written when the file gave a
	// continuous-time model (`model.time: continuous`), for reports; nil for
	// a discrete model.
	Continuous *ContinuousModel

	// ProcessStd and MeasurementStd say the file gave that noise as
	// standard deviations (key `std`, a diagonal covariance) rather than as
	// a covariance matrix (key `covariance`).
	ProcessStd, MeasurementStd bool

	// Inputs and Outputs are the wiring of each input and output, in the
	// order of the model's columns of B and rows of C.
	Inputs, Outputs []Wire

	// Initial is the absolute initial state (key `initial.state`); by default
	// the operating point X0.
	Initial []float64
	// InitialCov is the covariance of the initial state (key
	// `initial.covariance`, or `initial.std` for a diagonal one); nil when the
	// file gives neither, and the estimator then starts from the steady-state
	// covariance of its gain set.
	InitialCov *mat.SymDense

	// GainsPath is the gains file (key `gains`), resolved against the plant
	// file's directory when relative; by default "<name>.gains.yaml" in that
	// directory.
	GainsPath string
	// Gate is the probability of the outlier gate (key `gate`): a sample
	// whose NIS exceeds the chi-square quantile of this probability is
	// rejected. In [0, 1); 0 disables the gate; default DefaultGate.
	Gate float64
	// Publish is the subject prefix for estimates (key `publish`); default
	// "surmise.<name>". Estimates go to "<publish>.estimate".
	Publish string
	// Window is the length in ticks of the windowed NIS (key `window`),
	// 1 to MaxWindow; default DefaultWindow.
	Window int
}

// ContinuousModel is a continuous-time model as written in a plant file,
//
//	dx/dt = A·x + B·u + w,  E[w(t)·w(s)ᵀ] = Qc·δ(t − s)
//	y     = C·x + D·u + v,
//
// kept beside the discrete model it was turned into (zero-order hold, and Van
// Loan's method for Qc; see estimator.Discretise).
type ContinuousModel struct {
	A, B, C, D *mat.Dense
	// Qc is the process-noise spectral density (units² per second) when the
	// file gave the process noise as a continuous intensity
	// (`noise.process.time: continuous`); nil when it gave the covariance of
	// one sample.
	Qc *mat.SymDense
}

// Wire is how one input or output reaches the estimator on the bus.
type Wire struct {
	// Signal is the input or output name; Unit its engineering unit.
	Signal, Unit string
	// Subject is the bus subject its samples arrive on (key `subject`,
	// required): dot-separated tokens, no wildcards or spaces, unique in
	// the plant.
	Subject string
	// MaxAge is the age beyond which a sample is stale (key `max_age`, a
	// duration such as "3s"); default DefaultMaxAgeTicks sample periods.
	MaxAge time.Duration
	// Min and Max are the valid range (key `range: [lo, hi]`), meaningful
	// when HasRange; samples outside it are rejected.
	Min, Max float64
	HasRange bool
}

// LoadPlant reads and parses a plant file.
func LoadPlant(path string) (*Plant, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("cannot read the plant file: %w", err)
	}
	return ParsePlant(path, data)
}

// ParsePlant parses and validates the plant file data; filename is used in
// error messages, as Plant.Path, and to resolve a relative gains path. It does
// no I/O. On failure the error is an *ErrorList holding every problem found.
func ParsePlant(filename string, data []byte) (*Plant, error) {
	d := &decoder{file: filename}
	root := d.document(data, "plant")
	if root == nil {
		return nil, d.err()
	}
	var r rawPlant
	r.walk(d, root)
	if d.stopped {
		return nil, d.err()
	}
	r.check(d)
	if err := d.err(); err != nil {
		return nil, err
	}
	p, err := r.build(filename)
	if err != nil {
		return nil, err
	}
	return p, nil
}

// rawPlant is a plant file as read, before the checks that span fields.
type rawPlant struct {
	node     *yaml.Node
	name     string
	nameNode *yaml.Node

	model *rawModel

	states, inputs, outputs []*rawSignal
	// statesNode and the others are the list nodes, nil when absent.
	statesNode, inputsNode, outputsNode *yaml.Node

	process, measurement *rawNoise

	initState     []float64
	initStateNode *yaml.Node
	initStd       []float64
	initStdNode   *yaml.Node
	initCov       *matrix

	gains     string
	gainsNode *yaml.Node
	gate      float64
	gateNode  *yaml.Node
	publish   string
	pubNode   *yaml.Node
	window    int
	winNode   *yaml.Node
}

type rawModel struct {
	node       *yaml.Node
	time       string
	timeNode   *yaml.Node
	sample     time.Duration
	sampleNode *yaml.Node
	A, B, C, D *matrix
}

type rawSignal struct {
	path, kind  string
	node        *yaml.Node
	name        string
	nameNode    *yaml.Node
	unit        string
	nominal     float64
	subject     string
	subjectNode *yaml.Node
	maxAge      time.Duration
	maxAgeNode  *yaml.Node
	lo, hi      float64
	rangeNode   *yaml.Node
	rangeOK     bool
}

type rawNoise struct {
	path     string
	node     *yaml.Node
	time     string
	timeNode *yaml.Node
	std      []float64
	stdNode  *yaml.Node
	stdOK    bool
	cov      *matrix
}

func (r *rawPlant) walk(d *decoder, root *yaml.Node) {
	r.node = root
	d.mapping(root, "", []field{
		{"name", true, func(v *yaml.Node, p string) {
			r.nameNode = v
			if s, ok := d.str(v, p); ok {
				r.name = s
				if !estimatorName.MatchString(s) {
					d.errorf(v, p, "%q is not a valid name: want a lowercase letter, then lowercase letters, digits, '-' or '_' (at most 63)", s)
				}
			}
		}},
		{"model", true, func(v *yaml.Node, p string) { r.model = r.walkModel(d, v, p) }},
		{"states", true, func(v *yaml.Node, p string) { r.statesNode, r.states = v, r.walkSignals(d, v, p, "state") }},
		{"inputs", true, func(v *yaml.Node, p string) { r.inputsNode, r.inputs = v, r.walkSignals(d, v, p, "input") }},
		{"outputs", true, func(v *yaml.Node, p string) { r.outputsNode, r.outputs = v, r.walkSignals(d, v, p, "output") }},
		{"noise", true, func(v *yaml.Node, p string) {
			d.mapping(v, p, []field{
				{"process", true, func(v *yaml.Node, p string) { r.process = walkNoise(d, v, p, true) }},
				{"measurement", true, func(v *yaml.Node, p string) { r.measurement = walkNoise(d, v, p, false) }},
			})
		}},
		{"initial", false, func(v *yaml.Node, p string) {
			d.mapping(v, p, []field{
				{"state", false, func(v *yaml.Node, p string) {
					r.initStateNode = v
					if x, ok := d.vector(v, p); ok {
						r.initState = x
					}
				}},
				{"std", false, func(v *yaml.Node, p string) {
					r.initStdNode = v
					if x, ok := d.vector(v, p); ok {
						r.initStd = x
						for i, s := range x {
							if s < 0 {
								d.errorf(v, index(p, i), "standard deviation %v, want ≥ 0", s)
							}
						}
					}
				}},
				{"covariance", false, func(v *yaml.Node, p string) { r.initCov = d.matrix(v, p) }},
			})
		}},
		{"gains", false, func(v *yaml.Node, p string) {
			r.gainsNode = v
			if s, ok := d.str(v, p); ok {
				r.gains = s
				if s == "" {
					d.errorf(v, p, "empty path")
				}
			}
		}},
		{"gate", false, func(v *yaml.Node, p string) {
			if x, ok := d.number(v, p); ok {
				r.gate, r.gateNode = x, v
				if x < 0 || x >= 1 {
					d.errorf(v, p, "probability %v, want 0 ≤ gate < 1 (0 disables the gate)", x)
				}
			}
		}},
		{"publish", false, func(v *yaml.Node, p string) {
			if s, ok := d.str(v, p); ok {
				r.publish, r.pubNode = s, v
				if msg := subjectProblem(s); msg != "" {
					d.errorf(v, p, "%s", msg)
				}
			}
		}},
		{"window", false, func(v *yaml.Node, p string) {
			if x, ok := d.integer(v, p); ok {
				r.window, r.winNode = x, v
				if x < 1 || x > MaxWindow {
					d.errorf(v, p, "%d ticks, want 1 to %d", x, MaxWindow)
				}
			}
		}},
	})
}

func (r *rawPlant) walkModel(d *decoder, v *yaml.Node, p string) *rawModel {
	m := &rawModel{node: v}
	d.mapping(v, p, []field{
		{"time", true, func(v *yaml.Node, p string) {
			if s, ok := d.str(v, p); ok {
				m.timeNode = v
				if s != "continuous" && s != "discrete" {
					d.errorf(v, p, "unknown kind %q: want continuous or discrete", s)
				} else {
					m.time = s
				}
			}
		}},
		{"sample", true, func(v *yaml.Node, p string) {
			if t, ok := d.duration(v, p); ok {
				m.sampleNode = v
				if t <= 0 {
					d.errorf(v, p, "sample time %v, want a positive duration", t)
				} else {
					m.sample = t
				}
			}
		}},
		{"A", true, func(v *yaml.Node, p string) { m.A = d.matrix(v, p) }},
		{"B", true, func(v *yaml.Node, p string) { m.B = d.matrix(v, p) }},
		{"C", true, func(v *yaml.Node, p string) { m.C = d.matrix(v, p) }},
		{"D", false, func(v *yaml.Node, p string) { m.D = d.matrix(v, p) }},
	})
	return m
}

func (r *rawPlant) walkSignals(d *decoder, v *yaml.Node, p, kind string) []*rawSignal {
	items, ok := d.sequence(v, p)
	if !ok {
		return nil
	}
	if len(items) == 0 {
		d.errorf(v, p, "empty list: want at least one %s", kind)
	}
	out := make([]*rawSignal, len(items))
	for i, it := range items {
		s := &rawSignal{path: index(p, i), kind: kind, node: it}
		out[i] = s
		fields := []field{
			{"name", true, func(v *yaml.Node, p string) {
				if n, ok := d.str(v, p); ok {
					s.name, s.nameNode = n, v
					if !signalName.MatchString(n) {
						d.errorf(v, p, "%q is not a valid signal name: want a letter, then letters, digits, '-' or '_' (at most 63)", n)
					}
				}
			}},
			{"unit", false, func(v *yaml.Node, p string) { s.unit, _ = d.str(v, p) }},
			{"nominal", false, func(v *yaml.Node, p string) { s.nominal, _ = d.number(v, p) }},
		}
		if kind != "state" {
			fields = append(fields,
				field{"subject", true, func(v *yaml.Node, p string) {
					if n, ok := d.str(v, p); ok {
						s.subject, s.subjectNode = n, v
						if msg := subjectProblem(n); msg != "" {
							d.errorf(v, p, "%s", msg)
						}
					}
				}},
				field{"max_age", false, func(v *yaml.Node, p string) {
					if t, ok := d.duration(v, p); ok {
						s.maxAge, s.maxAgeNode = t, v
						if t <= 0 {
							d.errorf(v, p, "%v, want a positive duration", t)
						}
					}
				}},
				field{"range", false, func(v *yaml.Node, p string) {
					s.rangeNode = v
					x, ok := d.vector(v, p)
					switch {
					case !ok:
					case len(x) != 2:
						d.errorf(v, p, "want [lo, hi], got %d numbers", len(x))
					case !(x[0] < x[1]):
						d.errorf(v, p, "lo %v is not below hi %v", x[0], x[1])
					default:
						s.lo, s.hi, s.rangeOK = x[0], x[1], true
					}
				}},
			)
		}
		d.mapping(it, s.path, fields)
	}
	return out
}

func walkNoise(d *decoder, v *yaml.Node, p string, process bool) *rawNoise {
	nz := &rawNoise{path: p, node: v}
	fields := []field{
		{"std", false, func(v *yaml.Node, p string) {
			nz.stdNode = v
			nz.std, nz.stdOK = d.vector(v, p)
			for i, s := range nz.std {
				if process && s < 0 {
					d.errorf(v, index(p, i), "standard deviation %v, want ≥ 0", s)
				}
				if !process && s <= 0 {
					d.errorf(v, index(p, i), "standard deviation %v, want > 0", s)
				}
			}
		}},
		{"covariance", false, func(v *yaml.Node, p string) { nz.cov = d.matrix(v, p) }},
	}
	if process {
		fields = append(fields, field{"time", false, func(v *yaml.Node, p string) {
			if s, ok := d.str(v, p); ok {
				nz.timeNode = v
				if s != "continuous" && s != "discrete" {
					d.errorf(v, p, "unknown kind %q: want continuous (an intensity) or discrete (a covariance per sample)", s)
				} else {
					nz.time = s
				}
			}
		}})
	}
	if d.mapping(v, p, fields) {
		if nz.stdNode != nil && nz.cov != nil {
			d.errorf(v, p, "give either std or covariance, not both")
		}
		if nz.stdNode == nil && nz.cov == nil {
			d.errorf(v, p, "give std (one per %s) or covariance", map[bool]string{true: "state", false: "output"}[process])
		}
	}
	return nz
}

// check runs the checks that span fields: dimensions against the signal
// lists, unique names and subjects, and the noise and initial values.
func (r *rawPlant) check(d *decoder) {
	n, m, p := len(r.states), len(r.inputs), len(r.outputs)
	haveN, haveM, haveP := r.statesNode != nil && n > 0, r.inputsNode != nil && m > 0, r.outputsNode != nil && p > 0
	if n > MaxStates {
		d.errorf(r.statesNode, "states", "%d states, at most %d are supported", n, MaxStates)
		haveN = false
	}
	if m > MaxInputs {
		d.errorf(r.inputsNode, "inputs", "%d inputs, at most %d are supported", m, MaxInputs)
		haveM = false
	}
	if p > estimator.MaxOutputs {
		d.errorf(r.outputsNode, "outputs", "%d outputs, at most %d are supported", p, estimator.MaxOutputs)
		haveP = false
	}

	// Signals: names unique across the three lists, subjects unique, nominal
	// inside the range.
	names := map[string]*rawSignal{}
	subjects := map[string]*rawSignal{}
	for _, list := range [][]*rawSignal{r.states, r.inputs, r.outputs} {
		for _, s := range list {
			if s.nameNode != nil {
				if first, dup := names[s.name]; dup {
					d.errorf(s.nameNode, join(s.path, "name"), "duplicate signal name %q (also %s at line %d)", s.name, first.path, first.nameNode.Line)
				} else {
					names[s.name] = s
				}
			}
			if s.subjectNode != nil {
				if first, dup := subjects[s.subject]; dup {
					d.errorf(s.subjectNode, join(s.path, "subject"), "duplicate subject %q (also %s at line %d)", s.subject, first.path, first.subjectNode.Line)
				} else {
					subjects[s.subject] = s
				}
			}
			if s.rangeOK && (s.nominal < s.lo || s.nominal > s.hi) {
				d.errorf(s.rangeNode, join(s.path, "range"), "the nominal value %v is outside [%v, %v]", s.nominal, s.lo, s.hi)
			}
		}
	}
	if r.name != "" && r.pubNode == nil {
		r.publish = PublishRoot + "." + r.name
	}
	if r.publish != "" {
		for _, suffix := range []string{".estimate", ".shadow.estimate"} {
			if s, clash := subjects[r.publish+suffix]; clash {
				d.errorf(s.subjectNode, join(s.path, "subject"), "%q is where this estimator publishes its estimates (publish prefix %q)", s.subject, r.publish)
			}
		}
	}

	// Model dimensions.
	if md := r.model; md != nil {
		if md.A != nil && md.A.ok {
			if ar, ac := md.A.dims(); ar != ac {
				d.errorf(md.A.node, "model.A", "%d×%d: A must be square (states by states)", ar, ac)
			} else if haveN {
				d.shape(md.A, "model.A", n, "states", n, "states")
			}
		}
		if haveN && haveM {
			d.shape(md.B, "model.B", n, "states", m, "inputs")
		}
		if haveP && haveN {
			d.shape(md.C, "model.C", p, "outputs", n, "states")
		}
		if haveP && haveM {
			d.shape(md.D, "model.D", p, "outputs", m, "inputs")
		}
		if md.time == "continuous" && md.sample > 0 {
			r.checkExponent(d)
		}
		if md.time == "discrete" && r.process != nil && r.process.time == "continuous" {
			d.errorf(r.process.timeNode, "noise.process.time", "a discrete model takes its process noise as a covariance per sample: want discrete")
		}
	}

	// Noise.
	if nz := r.process; nz != nil && haveN {
		checkNoise(d, nz, n, "state", false)
	}
	if nz := r.measurement; nz != nil && haveP {
		checkNoise(d, nz, p, "output", true)
	}

	// Initial state.
	if haveN {
		if r.initStateNode != nil && r.initState != nil && len(r.initState) != n {
			d.errorf(r.initStateNode, "initial.state", "%d values, want %d (one per state)", len(r.initState), n)
		}
		if r.initStdNode != nil && r.initStd != nil && len(r.initStd) != n {
			d.errorf(r.initStdNode, "initial.std", "%d values, want %d (one per state)", len(r.initStd), n)
		}
		if r.initCov != nil && d.shape(r.initCov, "initial.covariance", n, "states", n, "states") {
			if _, msg := covariance(r.initCov.rows, false); msg != "" {
				d.errorf(r.initCov.node, "initial.covariance", "%s", msg)
			}
		}
	}
	if r.initStdNode != nil && r.initCov != nil {
		d.errorf(r.initStdNode, "initial", "give either std or covariance, not both")
	}
}

func checkNoise(d *decoder, nz *rawNoise, size int, per string, strict bool) {
	if nz.stdOK && len(nz.std) != size {
		d.errorf(nz.stdNode, join(nz.path, "std"), "%d values, want %d (one per %s)", len(nz.std), size, per)
	}
	if nz.cov != nil && nz.stdNode == nil && d.shape(nz.cov, join(nz.path, "covariance"), size, per+"s", size, per+"s") {
		if _, msg := covariance(nz.cov.rows, strict); msg != "" {
			d.errorf(nz.cov.node, join(nz.path, "covariance"), "%s", msg)
		}
	}
}

// noiseMatrix returns the covariance given by std or covariance; the checks
// have passed.
func (nz *rawNoise) matrix(strict bool) *mat.SymDense {
	if nz.cov != nil {
		s, _ := covariance(nz.cov.rows, strict)
		return s
	}
	return diagonal(nz.std)
}

// build turns a checked rawPlant into a Plant.
func (r *rawPlant) build(filename string) (*Plant, error) {
	md := r.model
	m, p := len(r.inputs), len(r.outputs)
	ts := md.sample.Seconds()
	a, b, c := dense(md.A.rows), dense(md.B.rows), dense(md.C.rows)
	dd := mat.NewDense(p, m, nil)
	if md.D != nil {
		dd = dense(md.D.rows)
	}
	q := r.process.matrix(false)
	model := &estimator.Model{
		C:  mat.DenseCopyOf(c),
		D:  mat.DenseCopyOf(dd),
		Ts: ts,
		R:  r.measurement.matrix(true),
	}
	plant := &Plant{Name: r.name, Path: filename, Model: model,
		ProcessStd: r.process.stdNode != nil, MeasurementStd: r.measurement.stdNode != nil}
	if md.time == "continuous" {
		cont := &ContinuousModel{A: a, B: b, C: c, D: dd}
		if r.process.time != "discrete" {
			cont.Qc = q
			model.A, model.B, model.Q = estimator.Discretise(a, b, q, ts)
		} else {
			model.A, model.B, _ = estimator.Discretise(a, b, nil, ts)
			model.Q = q
		}
		plant.Continuous = cont
	} else {
		model.A, model.B, model.Q = a, b, q
	}
	for _, list := range []struct {
		raw  []*rawSignal
		sig  *[]estimator.Signal
		nom  *[]float64
		wire *[]Wire
	}{
		{r.states, &model.States, &model.X0, nil},
		{r.inputs, &model.Inputs, &model.U0, &plant.Inputs},
		{r.outputs, &model.Outputs, &model.Y0, &plant.Outputs},
	} {
		for _, s := range list.raw {
			*list.sig = append(*list.sig, estimator.Signal{Name: s.name, Unit: s.unit})
			*list.nom = append(*list.nom, s.nominal)
			if list.wire == nil {
				continue
			}
			w := Wire{Signal: s.name, Unit: s.unit, Subject: s.subject, MaxAge: s.maxAge,
				Min: s.lo, Max: s.hi, HasRange: s.rangeOK}
			if s.maxAgeNode == nil {
				w.MaxAge = DefaultMaxAgeTicks * md.sample
			}
			*list.wire = append(*list.wire, w)
		}
	}
	if err := model.Validate(); err != nil {
		// The file's numbers were finite; a non-finite discrete model means
		// the exponential overflowed.
		return nil, &ErrorList{Errors: []FieldError{{File: filename, Line: md.node.Line, Column: md.node.Column,
			Field: "model", Msg: fmt.Sprintf("the discrete model is unusable (%v); is A·sample too large?", err)}}}
	}

	plant.Initial = append([]float64(nil), model.X0...)
	if r.initState != nil {
		plant.Initial = r.initState
	}
	switch {
	case r.initCov != nil:
		plant.InitialCov, _ = covariance(r.initCov.rows, false)
	case r.initStd != nil:
		plant.InitialCov = diagonal(r.initStd)
	}
	plant.GainsPath = r.gains
	if r.gainsNode == nil {
		plant.GainsPath = r.name + ".gains.yaml"
	}
	if !filepath.IsAbs(plant.GainsPath) {
		plant.GainsPath = filepath.Join(filepath.Dir(filename), plant.GainsPath)
	}
	plant.Gate = DefaultGate
	if r.gateNode != nil {
		plant.Gate = r.gate
	}
	plant.Publish = r.publish
	plant.Window = DefaultWindow
	if r.winNode != nil {
		plant.Window = r.window
	}
	return plant, nil
}

// MaxContinuousNorm bounds ‖A‖₁·Ts of a continuous model: beyond it the
// fastest modes decay (or grow) by more than e^1000000 in one sample, which
// double precision cannot represent, and the matrix exponential would need
// ever more squarings (an infinite norm would never finish).
const MaxContinuousNorm = 1e6

// checkExponent refuses continuous models that cannot be discretised in
// double precision: ‖A‖₁·Ts above MaxContinuousNorm, or ‖B‖₁·Ts or the
// process intensity times Ts overflowing.
func (r *rawPlant) checkExponent(d *decoder) {
	md := r.model
	ts := md.sample.Seconds()
	if md.A != nil && md.A.ok {
		if v := norm1(md.A.rows) * ts; !(v <= MaxContinuousNorm) {
			d.errorf(md.A.node, "model.A", "‖A‖₁·sample is %.3g, more than %g: modes this fast cannot be discretised at this sample time", v, MaxContinuousNorm)
		}
	}
	if md.B != nil && md.B.ok {
		if v := norm1(md.B.rows) * ts; math.IsInf(v, 0) {
			d.errorf(md.B.node, "model.B", "‖B‖₁·sample overflows")
		}
	}
	if nz := r.process; nz != nil && nz.time != "discrete" {
		v := 0.0
		switch {
		case nz.cov != nil && nz.cov.ok:
			v = norm1(nz.cov.rows) * ts
		case nz.stdOK:
			for _, s := range nz.std {
				v = math.Max(v, s*s*ts)
			}
		}
		if math.IsInf(v, 0) {
			d.errorf(nz.node, "noise.process", "the intensity times the sample time overflows")
		}
	}
}

// norm1 is the largest column sum of absolute values.
func norm1(rows [][]float64) float64 {
	best := 0.0
	for j := range rows[0] {
		s := 0.0
		for i := range rows {
			s += math.Abs(rows[i][j])
		}
		best = math.Max(best, s)
	}
	return best
}
