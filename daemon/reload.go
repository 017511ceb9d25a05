package daemon

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"

	"surmise/config"
	"surmise/estimator"
)

// What asked for a reload or a change (AuditEntry.Trigger).
const (
	TriggerSignal  = "signal"  // SIGHUP
	TriggerFile    = "file"    // the plant's gains file changed on disk
	TriggerControl = "control" // a request to the control service
)

// DefaultMinDwell is the shortest time between two swaps of the active gain
// set by promote or rollback when CommissionerOptions.MinDwell is zero.
const DefaultMinDwell = 10 * time.Second

// The codes of a refused change: the control service's error codes.
const (
	CodeBadRequest = "400" // the request itself is malformed
	CodeRefused    = "409" // refused in the present state (dwell time, nothing to promote, restart needed)
	CodeInvalid    = "422" // the gains are invalid for the running model
)

// CommissionError is a refused change. The running gains and state are left
// as they were.
type CommissionError struct {
	Code   string   // CodeBadRequest, CodeRefused or CodeInvalid
	Reason string   // one line
	Detail []string // every problem found, one per line (file:line:column: field: message for a gains file)
}

// Error returns the reason and the details, one per line.
func (e *CommissionError) Error() string {
	if len(e.Detail) == 0 {
		return e.Reason
	}
	return e.Reason + ":\n" + strings.Join(e.Detail, "\n")
}

func refusal(code, format string, args ...any) *CommissionError {
	return &CommissionError{Code: code, Reason: fmt.Sprintf(format, args...)}
}

// Transfer says how a promotion hands the state over to the candidate's
// gains.
type Transfer string

const (
	// KeepState keeps the active state (and its covariance, Kalman to
	// Kalman) and swaps the gains: the estimate does not jump.
	KeepState Transfer = "keep-state"
	// AdoptState takes the candidate's own state, covariance and
	// consistency windows: the estimate jumps to the candidate's.
	AdoptState Transfer = "adopt-state"
)

// Origin is who asked for a change, for the audit trail.
type Origin struct {
	// Who is what the bus reports about the requester (see
	// RequestOrigin); empty for signals and file changes.
	Who string
	// Claimed is what the requester said about itself; nothing checks it.
	Claimed string
	// Verified says that Who is an identity the server vouched for (a
	// request through a service import).
	Verified bool
}

// CommissionerOptions configures a Commissioner.
type CommissionerOptions struct {
	// Plant is the plant the estimator runs, as parsed at start.
	Plant *config.Plant
	// Gains is the gains file as loaded at start; its Active set is what
	// the engine runs, its Candidate (if any) is started in shadow.
	Gains *config.GainsFile
	// GainsBytes, when not nil, are the bytes Gains was parsed from; else
	// they are read from the plant's gains file when it still says the
	// same.
	GainsBytes []byte
	// Engine is the estimator's engine. The Commissioner makes it run the
	// sets of Gains from its next tick on.
	Engine *Engine
	// Metrics are the estimator's series (reload counters); nil for none.
	Metrics *EstimatorMetrics
	// Audit receives every accepted change; nil keeps none.
	Audit *Audit
	// Logger receives refusals and accepted changes; nil for none.
	Logger *slog.Logger
	// MinDwell is the shortest time between two swaps of the active set
	// by promote or rollback; zero means DefaultMinDwell, negative none.
	// Reloads of the gains file are not held back by it: they are the
	// operator's deliberate edits.
	MinDwell time.Duration
	// OnGains, when not nil, is called with the gains file in effect after
	// every accepted change (for Estimator.SetGains). The file's Active and
	// Candidate are what runs.
	OnGains func(*config.GainsFile)
	// Now is the clock for the dwell time and the audit; nil means
	// time.Now.
	Now func() time.Time
}

// runSet is a gain set the engine runs or may run again: prepared for the
// plant's model, with its entry of the gains file.
type runSet struct {
	prep  *estimator.Prepared
	named config.NamedSet
}

func (r *runSet) ref(fingerprint string) SetRef {
	return SetRef{Name: r.named.Set.Name, Form: r.named.Set.Form.String(), Fingerprint: fingerprint}
}

func refOrNil(r *runSet, fingerprint string) *SetRef {
	if r == nil {
		return nil
	}
	ref := r.ref(fingerprint)
	return &ref
}

// ReloadResult is the outcome of the latest reload.
type ReloadResult struct {
	Time    time.Time `json:"time"`
	Trigger string    `json:"trigger"`
	Source  string    `json:"source,omitempty"`
	Result  string    `json:"result"` // "ok" or "refused"
	Reason  string    `json:"reason,omitempty"`
	Detail  []string  `json:"detail,omitempty"`
}

// Commissioner changes the gains and the state of one running estimator:
// reloads of its gains file (SIGHUP, a change on disk, a control request),
// the candidate set run in shadow, promotion, roll-back and reset. Every
// change is validated in full first; a refused one leaves the running gains
// untouched, is counted (surmise_gain_reloads_total{result="refused"},
// surmise_gain_last_reload_success 0 for reloads), logged with its reason and
// returned as a *CommissionError. An accepted one is handed to the engine,
// which applies it at its next tick boundary, and goes to the audit trail.
// Gains are never blended: each tick runs one prepared set from start to end.
//
// A Commissioner is safe for concurrent use. It starts no goroutine.
type Commissioner struct {
	name        string
	plant       *config.Plant
	fingerprint string
	eng         *Engine
	met         *EstimatorMetrics
	audit       *Audit
	log         *slog.Logger
	dwell       time.Duration
	onGains     func(*config.GainsFile)
	now         func() time.Time

	mu         sync.Mutex
	file       *config.GainsFile // in effect: Active and Candidate are what runs
	source     string            // where it came from: a file name or "control request"
	inEffect   string            // SHA-256 of the gains bytes in effect; "" when unknown
	gainsDisk  string            // SHA-256 of the gains file as last read from disk
	plantSum   string            // SHA-256 of the plant file the estimator runs; "" when unknown
	plantDisk  string            // SHA-256 of the plant file as last read from disk
	restart    string            // why a restart is needed; "" when not
	active     *runSet
	cand, prev *runSet
	lastSwap   time.Time
	last       *ReloadResult

	obsMu sync.Mutex
	obs   [2]laneView // the latest tick of the active and the candidate lane
}

// laneView is what a tick showed of one lane, for status and the jump of an
// adopt-state promotion.
type laneView struct {
	has          bool
	gains        string
	seq          uint64
	time         time.Time
	status       Status
	nisMean      float64
	lo, hi       float64
	x, std       []float64
	names, units []string
}

// NewCommissioner returns the commissioner of one estimator. It prepares the
// gains file's active and candidate sets and asks the engine to run them from
// its next tick (the candidate in shadow), and it reads the plant and gains
// files to remember their content hashes. It starts nothing.
func NewCommissioner(opts CommissionerOptions) (*Commissioner, error) {
	if opts.Plant == nil || opts.Gains == nil || opts.Engine == nil {
		return nil, errors.New("commissioner: plant, gains and engine are required")
	}
	c := &Commissioner{
		name:        opts.Plant.Name,
		plant:       opts.Plant,
		fingerprint: config.Fingerprint(opts.Plant.Model),
		eng:         opts.Engine,
		met:         opts.Metrics,
		audit:       opts.Audit,
		log:         opts.Logger,
		dwell:       opts.MinDwell,
		onGains:     opts.OnGains,
		now:         opts.Now,
		file:        opts.Gains,
		source:      opts.Plant.GainsPath,
	}
	if c.log == nil {
		c.log = slog.New(slog.DiscardHandler)
	}
	if c.now == nil {
		c.now = time.Now
	}
	switch {
	case c.dwell == 0:
		c.dwell = DefaultMinDwell
	case c.dwell < 0:
		c.dwell = 0
	}
	// The file the daemon was started with has been through ParseGains; the
	// rules only a reload applies (the gate needs S) are not applied to it,
	// and a candidate that cannot run is left out rather than stopping the
	// estimator.
	act, cand, cerr := c.prepareFile(opts.Gains, false)
	if cerr != nil && opts.Gains.Candidate != "" {
		c.log.Warn("the candidate gain set cannot run: no shadow", "estimator", c.name, "candidate", opts.Gains.Candidate, "reason", cerr.Reason)
		noCand := *opts.Gains
		noCand.Candidate = ""
		c.file = &noCand
		act, cand, cerr = c.prepareFile(&noCand, false)
	}
	if cerr != nil {
		return nil, fmt.Errorf("commissioner %s: %w", c.name, cerr)
	}
	c.active, c.cand = act, cand
	n, _, _ := opts.Plant.Model.Dims()
	for i := range c.obs {
		v := &c.obs[i]
		v.x, v.std = make([]float64, n), make([]float64, n)
		v.names, v.units = make([]string, n), make([]string, n)
	}
	c.eng.enqueue(laneOp{kind: opActive, prep: act.prep}, laneOp{kind: opCandidate, prep: prepOf(cand)})

	// The hashes of the files as they are now, if they still say what the
	// daemon was started with. Otherwise they stay unknown, and the first
	// look at the disk (the watcher makes one as soon as it watches)
	// reloads the gains, or refuses the plant file.
	if opts.GainsBytes != nil {
		c.inEffect = digest(opts.GainsBytes)
	} else if data, err := os.ReadFile(c.plant.GainsPath); err == nil {
		if g, err := config.ParseGains(c.plant.GainsPath, data, c.plant); err == nil && reflect.DeepEqual(g, opts.Gains) {
			c.inEffect = digest(data)
			c.gainsDisk = c.inEffect
		}
	}
	if c.plant.Path != "" {
		if data, err := os.ReadFile(c.plant.Path); err == nil {
			if p, err := config.ParsePlant(c.plant.Path, data); err == nil && plantDiff(c.plant, p) == "" {
				c.plantSum = digest(data)
				c.plantDisk = c.plantSum
			}
		}
	}
	return c, nil
}

func prepOf(r *runSet) *estimator.Prepared {
	if r == nil {
		return nil
	}
	return r.prep
}

func digest(data []byte) string {
	s := sha256.Sum256(data)
	return hex.EncodeToString(s[:])
}

// Name returns the estimator's name.
func (c *Commissioner) Name() string { return c.name }

// prepareFile prepares the active and candidate sets of a parsed gains file;
// strict (a reload) also checks what ParseGains leaves to the runtime: the
// outlier gate needs S.
func (c *Commissioner) prepareFile(g *config.GainsFile, strict bool) (act, cand *runSet, err *CommissionError) {
	if g.Fingerprint != c.fingerprint {
		return nil, nil, refusal(CodeInvalid, "the gains were designed for model %s, the running model is %s", g.Fingerprint, c.fingerprint)
	}
	prep := func(name, role string) (*runSet, *CommissionError) {
		ns := g.Set(name)
		if ns == nil {
			return nil, refusal(CodeInvalid, "the %s set %q is not in the gains file", role, name)
		}
		if strict && c.plant.Gate > 0 && ns.Set.Form != estimator.Kalman {
			for i, pg := range ns.Set.Gains {
				if pg.S == nil {
					return nil, refusal(CodeInvalid, "%s set %q, gain %d: no S, and the plant's outlier gate (probability %v) needs it to compute NIS (design the gains with the plant's noise, or set gate: 0)", role, name, i, c.plant.Gate)
				}
			}
		}
		p, perr := estimator.Prepare(c.plant.Model, ns.Set, c.plant.Gate)
		if perr != nil {
			return nil, refusal(CodeInvalid, "%s set %q: %v", role, name, perr)
		}
		return &runSet{prep: p, named: *ns}, nil
	}
	act, err = prep(g.Active, "active")
	if err != nil {
		return nil, nil, err
	}
	if g.Candidate != "" {
		if g.Candidate == g.Active {
			return nil, nil, refusal(CodeInvalid, "the candidate set %q is the active set", g.Candidate)
		}
		if cand, err = prep(g.Candidate, "candidate"); err != nil {
			return nil, nil, err
		}
	}
	return act, cand, nil
}

// Selection overrides the active and candidate sets named by a gains file.
type Selection struct {
	// Active, when not "", is the set to run instead of the file's active
	// one.
	Active string
	// Candidate, when not nil, is the set to run in shadow instead of the
	// file's candidate; "" for none.
	Candidate *string
}

// LoadReply is the result of an accepted load.
type LoadReply struct {
	Active    SetRef  `json:"active"`
	Candidate *SetRef `json:"candidate"`
	Previous  *SetRef `json:"previous"`
	SHA256    string  `json:"sha256"`
	// Changed is false when the gains are those already in effect.
	Changed bool   `json:"changed"`
	Note    string `json:"note"`
}

// Load validates the gains file data (source names it in messages) against
// the running model and, if it is valid, makes the engine run its active set
// from the next tick, state carried over, and its candidate in shadow. The
// active set is swapped only when its name or numbers changed, and the
// candidate lane restarted only when its set changed.
func (c *Commissioner) Load(data []byte, source string, sel Selection, trigger string, who Origin) (*LoadReply, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	r, err := c.load(data, source, sel, trigger, who)
	if err != nil {
		return nil, err
	}
	return r, nil
}

func (c *Commissioner) load(data []byte, source string, sel Selection, trigger string, who Origin) (*LoadReply, *CommissionError) {
	// Positions in the file read "name:line:column" with the name the
	// requester gave, without the mark of a file sent over the bus.
	g, perr := config.ParseGains(strings.TrimSuffix(source, sentOverBus), data, c.plant)
	if perr != nil {
		cerr := &CommissionError{Code: CodeInvalid, Reason: "gains file " + source + " refused"}
		var list *config.ErrorList
		if errors.As(perr, &list) {
			for _, fe := range list.Errors {
				cerr.Detail = append(cerr.Detail, fe.Error())
			}
		} else {
			cerr.Detail = []string{perr.Error()}
		}
		return nil, c.refused(trigger, source, cerr)
	}
	if sel.Active != "" || sel.Candidate != nil {
		cp := *g
		if sel.Active != "" {
			cp.Active = sel.Active
			if cp.Candidate == cp.Active {
				cp.Candidate = ""
			}
		}
		if sel.Candidate != nil {
			cp.Candidate = *sel.Candidate
		}
		g = &cp
	}
	act, cand, cerr := c.prepareFile(g, true)
	if cerr != nil {
		cerr.Reason = "gains file " + source + " refused: " + cerr.Reason
		return nil, c.refused(trigger, source, cerr)
	}
	sum := digest(data)
	oldAct, oldCand := c.active, c.cand
	var ops []laneOp
	activeChanged := !sameSet(oldAct, act)
	if activeChanged {
		ops = append(ops, laneOp{kind: opActive, prep: act.prep})
	} else {
		act = oldAct // keep the prepared set the engine runs
	}
	candChanged := !sameSet(oldCand, cand)
	if candChanged {
		ops = append(ops, laneOp{kind: opCandidate, prep: prepOf(cand)})
	} else {
		cand = oldCand
	}
	c.eng.enqueue(ops...)
	if activeChanged {
		c.prev = oldAct
		c.lastSwap = c.now()
	}
	c.active, c.cand = act, cand
	c.file, c.source, c.inEffect = g, source, sum
	reply := &LoadReply{
		Active:    act.ref(c.fingerprint),
		Candidate: refOrNil(cand, c.fingerprint),
		Previous:  refOrNil(c.prev, c.fingerprint),
		SHA256:    sum,
		Changed:   activeChanged || candChanged,
	}
	switch {
	case activeChanged && oldAct.named.Set.Name == act.named.Set.Name:
		reply.Note = fmt.Sprintf("active set %s: new gains, state carried over", act.named.Set.Name)
	case activeChanged:
		reply.Note = fmt.Sprintf("active set %s → %s, state carried over", oldAct.named.Set.Name, act.named.Set.Name)
	default:
		reply.Note = fmt.Sprintf("active set %s unchanged", act.named.Set.Name)
	}
	switch {
	case candChanged && cand == nil:
		reply.Note += "; shadow stopped"
	case candChanged:
		reply.Note += fmt.Sprintf("; candidate %s started in shadow", cand.named.Set.Name)
	case cand != nil:
		reply.Note += fmt.Sprintf("; candidate %s keeps running", cand.named.Set.Name)
	}
	c.accepted(trigger, source, reply.Note)
	c.record(AuditEntry{
		Action: "load", Trigger: trigger, Origin: who.Who, OriginVerified: who.Verified, ClaimedBy: who.Claimed,
		Source: source, SHA256: sum,
		OldActive: oldAct.ref(c.fingerprint), NewActive: act.ref(c.fingerprint),
		OldCandidate: refOrNil(oldCand, c.fingerprint), NewCandidate: refOrNil(cand, c.fingerprint),
		Note: reply.Note,
	})
	return reply, nil
}

// sameSet reports whether the running set r is the set of a.
func sameSet(r, a *runSet) bool {
	if r == nil || a == nil {
		return r == nil && a == nil
	}
	return reflect.DeepEqual(r.named.Set, a.named.Set)
}

// accepted counts and logs an accepted reload.
func (c *Commissioner) accepted(trigger, source, note string) {
	c.last = &ReloadResult{Time: c.now(), Trigger: trigger, Source: source, Result: "ok", Reason: note}
	if c.met != nil {
		c.met.GainReload(true)
	}
	c.log.Info("gains reloaded", "estimator", c.name, "trigger", trigger, "source", source, "result", note)
	c.publishGains()
}

// refused counts and logs a refused reload and returns err.
func (c *Commissioner) refused(trigger, source string, err *CommissionError) *CommissionError {
	c.last = &ReloadResult{Time: c.now(), Trigger: trigger, Source: source, Result: "refused", Reason: err.Reason, Detail: err.Detail}
	if c.met != nil {
		c.met.GainReload(false)
	}
	args := []any{"estimator", c.name, "trigger", trigger, "source", source, "reason", err.Reason}
	if len(err.Detail) > 0 {
		args = append(args, "problems", strings.Join(err.Detail, "; "))
	}
	c.log.Warn("gains reload refused; the running gains are unchanged", args...)
	return err
}

// record writes an audit entry.
func (c *Commissioner) record(e AuditEntry) {
	if c.audit == nil {
		return
	}
	e.Time = c.now()
	e.Estimator = c.name
	if err := c.audit.Record(e); err != nil {
		c.log.Warn("audit trail not written", "estimator", c.name, "error", err)
	}
}

// publishGains tells the estimator which gains file is in effect.
func (c *Commissioner) publishGains() {
	if c.onGains != nil {
		c.onGains(c.effectiveFile())
	}
}

// effectiveFile returns the gains file in effect with Active and Candidate
// naming what runs, and holding those sets (a set rolled back to may come
// from an earlier file).
func (c *Commissioner) effectiveFile() *config.GainsFile {
	g := *c.file
	g.Sets = slices.Clone(g.Sets)
	for _, r := range []*runSet{c.active, c.cand} {
		if r == nil {
			continue
		}
		if ns := g.Set(r.named.Set.Name); ns == nil {
			g.Sets = append(g.Sets, r.named)
		} else {
			*ns = r.named
		}
	}
	g.Active = c.active.named.Set.Name
	g.Candidate = ""
	if c.cand != nil {
		g.Candidate = c.cand.named.Set.Name
	}
	return &g
}

// Gains returns the gains file in effect (see effectiveFile).
func (c *Commissioner) Gains() *config.GainsFile {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.effectiveFile()
}

// ReloadFromDisk reads the plant file and the gains file again and loads the
// gains if they differ from those in effect (SIGHUP). With onlyIfChanged
// (a change seen in the files' directory) it does nothing unless one of the
// two files differs from when it was last read.
//
// A plant file that differs from the one the estimator runs — in its model,
// wiring or settings; a change of comments or layout alone is accepted — is
// refused with "restart needed", and so is every reload from disk until the
// plant file is put back or the daemon restarts: the two files go together.
// A gains file whose content is that in effect is an accepted reload that
// changes nothing. It returns the load's reply, nil when nothing was done.
func (c *Commissioner) ReloadFromDisk(trigger string, onlyIfChanged bool) (*LoadReply, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	var plantData []byte
	var plantErr error
	if c.plant.Path != "" {
		plantData, plantErr = os.ReadFile(c.plant.Path)
	}
	gainsData, gainsErr := os.ReadFile(c.plant.GainsPath)
	// What the disk holds: a content hash, or the error reading it, so that
	// a file that stays unreadable is reported once, not at every event.
	plantSeen, gainsSeen := c.plantDisk, c.gainsDisk
	c.plantDisk, c.gainsDisk = diskState(plantData, plantErr), diskState(gainsData, gainsErr)
	if onlyIfChanged && c.plantDisk == plantSeen && c.gainsDisk == gainsSeen {
		return nil, nil
	}
	source := c.plant.GainsPath
	if plantErr != nil {
		c.restart = fmt.Sprintf("plant file %s unreadable (%v): restart needed once it is back", c.plant.Path, plantErr)
		return nil, c.refused(trigger, c.plant.Path, &CommissionError{Code: CodeRefused,
			Reason: c.restart + "; the gains file was not reloaded, the running plant and gains are unchanged"})
	}
	if c.plant.Path != "" {
		if c.plantDisk != c.plantSum {
			if what := c.checkPlant(plantData); what != "" {
				c.restart = fmt.Sprintf("plant file %s changed (%s): restart needed", c.plant.Path, what)
				return nil, c.refused(trigger, c.plant.Path, &CommissionError{Code: CodeRefused,
					Reason: c.restart + "; the gains file was not reloaded, the running plant and gains are unchanged"})
			}
			c.plantSum = c.plantDisk // comments or layout only
		}
		c.restart = ""
	}
	if gainsErr != nil {
		return nil, c.refused(trigger, source, refusal(CodeInvalid, "gains file unreadable: %v", gainsErr))
	}
	if c.gainsDisk == c.inEffect && c.source == source {
		note := "gains file unchanged: nothing to do"
		c.accepted(trigger, source, note)
		return &LoadReply{Active: c.active.ref(c.fingerprint), Candidate: refOrNil(c.cand, c.fingerprint),
			Previous: refOrNil(c.prev, c.fingerprint), SHA256: c.inEffect, Note: note}, nil
	}
	r, err := c.load(gainsData, source, Selection{}, trigger, Origin{})
	if err != nil {
		return nil, err
	}
	return r, nil
}

// diskState is a file's content hash, or the error that kept it from being
// read.
func diskState(data []byte, err error) string {
	if err != nil {
		return "error: " + err.Error()
	}
	return digest(data)
}

// checkPlant parses the plant file data and says how it differs from the
// running plant: "" when it does not (comments, layout), else what changed,
// or why it cannot be read.
func (c *Commissioner) checkPlant(data []byte) string {
	p, err := config.ParsePlant(c.plant.Path, data)
	if err != nil {
		var list *config.ErrorList
		if errors.As(err, &list) && len(list.Errors) > 0 {
			return "now invalid: " + list.Errors[0].Error()
		}
		return "now invalid: " + err.Error()
	}
	return plantDiff(c.plant, p)
}

// plantDiff says which parts of plant b differ from a: "" when none.
func plantDiff(a, b *config.Plant) string {
	var what []string
	if config.Fingerprint(a.Model) != config.Fingerprint(b.Model) {
		what = append(what, "model")
	} else if !reflect.DeepEqual(a.Model, b.Model) || !reflect.DeepEqual(a.Continuous, b.Continuous) {
		what = append(what, "noise, operating point or units")
	}
	if !reflect.DeepEqual(a.Inputs, b.Inputs) || !reflect.DeepEqual(a.Outputs, b.Outputs) {
		what = append(what, "wiring")
	}
	if a.Name != b.Name || a.GainsPath != b.GainsPath || a.Gate != b.Gate || a.Publish != b.Publish ||
		a.Window != b.Window || !reflect.DeepEqual(a.Initial, b.Initial) || !reflect.DeepEqual(a.InitialCov, b.InitialCov) {
		what = append(what, "settings")
	}
	return strings.Join(what, ", ")
}

// commissioning is a daemon's machinery for changing gains at run time:
// one Commissioner per estimator, the audit trail, the reload requests
// (SIGHUP), the file watcher and the control service.
type commissioning struct {
	audit  *Audit
	reload chan string // pending reload request: its trigger; capacity 1
	svc    micro.Service
	index  *ControlIndex // the estimators the control service answers for
}

// newCommissioning builds the commissioners of the daemon's estimators; New
// calls it after the engines are built. It starts nothing.
func (d *Daemon) newCommissioning() error {
	path := ""
	if d.opts.StateDir != "" {
		path = filepath.Join(d.opts.StateDir, AuditFile)
	}
	d.comm = &commissioning{audit: NewAudit(path), reload: make(chan string, 1)}
	for i, e := range d.estimators {
		c, err := NewCommissioner(CommissionerOptions{
			Plant:      e.plant,
			Gains:      d.opts.Plants[i].Gains,
			GainsBytes: d.opts.Plants[i].GainsBytes,
			Engine:     e.engine,
			Metrics:    e.metrics,
			Audit:      d.comm.audit,
			Logger:     d.log,
			MinDwell:   d.opts.MinDwell,
			OnGains:    func(g *config.GainsFile) { e.SetGains(g, true) },
		})
		if err != nil {
			return err
		}
		e.comm = c
		e.shadow = shadowLane{subject: ShadowSubject(e.subject), est: e.engine.NewEstimate()}
		e.shadow.est.Instance = e.d.opts.Instance
	}
	return nil
}

// Commissioner returns the estimator's commissioner: reloads, the shadow
// candidate, promotion, roll-back and reset.
func (e *Estimator) Commissioner() *Commissioner { return e.comm }

// AuditPath returns the file the audit trail of accepted gain changes is
// appended to (StateDir/gains-audit.jsonl), "" when the daemon has no state
// directory and keeps the trail in memory only.
func (d *Daemon) AuditPath() string { return d.comm.audit.Path() }

// Reload asks every estimator to read its plant and gains files again and
// apply what changed, as SIGHUP does (cmd/surmise wires SIGHUP to
// Reload(TriggerSignal)); trigger goes to the audit trail. It returns at
// once: the reload runs on the daemon's reload goroutine once Run has
// started, and a request made while another is pending is merged into it.
// Each estimator's outcome is logged and counted in
// surmise_gain_reloads_total.
func (d *Daemon) Reload(trigger string) {
	select {
	case d.comm.reload <- trigger:
	default:
	}
}

// startCommissioning starts the control service on nc, the reload
// goroutine and, unless Options.ReloadDebounce is negative, the watcher of
// the plant and gains files' directories.
func (d *Daemon) startCommissioning(g *Group, nc *nats.Conn) error {
	comms := make([]*Commissioner, len(d.estimators))
	var files []string
	for i, e := range d.estimators {
		comms[i] = e.comm
		if e.plant.Path != "" {
			files = append(files, e.plant.Path)
		}
		files = append(files, e.plant.GainsPath)
	}
	if d.comm.audit.Path() == "" {
		d.log.Info("no state directory: the audit trail of gain changes is kept in memory only")
	}
	d.comm.index = NewControlIndex()
	for _, c := range comms {
		d.comm.index.Add(c)
	}
	// The estimators of plant files are steered only through the daemon
	// that holds their lease (a fleet's are added and removed with their
	// ownership, fleet_run.go).
	leased := make(map[string]*Estimator, len(d.estimators))
	for _, e := range d.estimators {
		if e.fleet == nil {
			leased[e.name] = e
		}
	}
	d.comm.index.ServeOnly(func(name string) bool {
		e, ok := leased[name]
		return !ok || e.mayPublish()
	})
	svc, err := StartControlIndex(nc, d.comm.index)
	if err != nil {
		return err
	}
	d.comm.svc = svc
	g.Go("reload", func(ctx context.Context) error {
		for {
			select {
			case <-ctx.Done():
				return nil
			case trigger := <-d.comm.reload:
				for _, c := range comms {
					c.ReloadFromDisk(trigger, false) // logged and counted by the commissioner
				}
			}
		}
	})
	if d.opts.ReloadDebounce >= 0 {
		w := NewWatcher(files, d.opts.ReloadDebounce, func() {
			for _, c := range comms {
				c.ReloadFromDisk(TriggerFile, true)
			}
		}, d.log)
		g.Go("watch", w.Run)
	}
	return nil
}

// stopCommissioning stops the control service (before the connection
// closes); the goroutines stop with the group.
func (d *Daemon) stopCommissioning() {
	if d.comm != nil && d.comm.svc != nil {
		if err := d.comm.svc.Stop(); err != nil {
			d.log.Warn("stopping the control service", "error", err)
		}
	}
}
