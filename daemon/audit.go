package daemon

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"sync"
	"time"
)

// AuditFile is the name of the audit trail in the daemon's state directory.
const AuditFile = "gains-audit.jsonl"

// auditKeep is how many entries an Audit keeps in memory for status replies.
const auditKeep = 256

// SetRef names a gain set in an audit entry or a status reply: its name and
// form, and the fingerprint of the model it was designed for.
type SetRef struct {
	Name        string `json:"name"`
	Form        string `json:"form"`
	Fingerprint string `json:"fingerprint"`
}

// AuditEntry is one accepted change of an estimator's gains or state, one
// line of the audit trail.
type AuditEntry struct {
	Time      time.Time `json:"time"`
	Estimator string    `json:"estimator"`
	// Action is "load" (a gains file was accepted), "promote", "rollback"
	// or "reset".
	Action string `json:"action"`
	// Trigger is what asked for it: "signal" (SIGHUP), "file" (the gains
	// file changed on disk) or "control" (a request to the control
	// service).
	Trigger string `json:"trigger"`
	// Origin is who asked, for control requests: the client the server
	// vouches for (the Nats-Request-Info header of a request through a
	// service import; OriginVerified is then true), else the request's
	// reply subject. ClaimedBy is what the client said about itself (the
	// Surmise-Operator header, and a Nats-Request-Info header the server
	// did not write, marked "unverified"); nothing checks it.
	Origin         string `json:"origin,omitempty"`
	OriginVerified bool   `json:"origin_verified,omitempty"`
	ClaimedBy      string `json:"claimed_by,omitempty"`
	// Source and SHA256 are where the gains of a load came from (a file
	// name, or "control request") and the SHA-256 of its bytes.
	Source string `json:"source,omitempty"`
	SHA256 string `json:"sha256,omitempty"`
	// Active and Candidate before and after; a nil candidate is none.
	OldActive    SetRef  `json:"old_active"`
	NewActive    SetRef  `json:"new_active"`
	OldCandidate *SetRef `json:"old_candidate,omitempty"`
	NewCandidate *SetRef `json:"new_candidate,omitempty"`
	// Transfer is how a promotion handed the state over ("keep-state" or
	// "adopt-state"); Jump the Euclidean norm of the jump of the state it
	// caused (adopt-state), in the states' units.
	Transfer string   `json:"transfer,omitempty"`
	Jump     *float64 `json:"jump,omitempty"`
	// Note is a human-readable summary.
	Note string `json:"note,omitempty"`
}

// Audit is the trail of accepted gain changes of a daemon: one JSON object
// per line appended to a file (when it has one), and the latest entries kept
// in memory for status replies. It is safe for concurrent use.
type Audit struct {
	path string // "" for memory only

	mu      sync.Mutex
	entries []AuditEntry // ring of the latest auditKeep
	next    int
	full    bool
}

// NewAudit returns an audit trail appending to path; "" keeps it in memory
// only. It opens nothing: each Record opens the file for appending, writes
// one line and closes it, so that the trail can be rotated or read at any
// time.
func NewAudit(path string) *Audit {
	return &Audit{path: path, entries: make([]AuditEntry, auditKeep)}
}

// Path returns the file the trail is appended to, "" for none.
func (a *Audit) Path() string { return a.path }

// Record adds e to the trail. The entry is kept in memory even when writing
// it to the file fails; the error says why the file did not get it.
func (a *Audit) Record(e AuditEntry) error {
	a.mu.Lock()
	defer a.mu.Unlock()
	a.entries[a.next] = e
	a.next++
	if a.next == len(a.entries) {
		a.next, a.full = 0, true
	}
	if a.path == "" {
		return nil
	}
	line, err := json.Marshal(e)
	if err != nil {
		return fmt.Errorf("audit: %w", err)
	}
	line = append(line, '\n')
	if err := os.MkdirAll(filepath.Dir(a.path), 0o750); err != nil {
		return fmt.Errorf("audit: %w", err)
	}
	f, err := os.OpenFile(a.path, os.O_WRONLY|os.O_APPEND|os.O_CREATE, 0o640)
	if err != nil {
		return fmt.Errorf("audit: %w", err)
	}
	_, werr := f.Write(line)
	if err := f.Close(); werr == nil {
		werr = err
	}
	if werr != nil {
		return fmt.Errorf("audit: writing %s: %w", a.path, werr)
	}
	return nil
}

// Tail returns the latest n entries of the estimator (all estimators when
// estimator is ""), oldest first, from memory.
func (a *Audit) Tail(estimator string, n int) []AuditEntry {
	a.mu.Lock()
	defer a.mu.Unlock()
	var out []AuditEntry
	count := a.next
	if a.full {
		count = len(a.entries)
	}
	for k := 0; k < count && len(out) < n; k++ {
		i := (a.next - 1 - k + len(a.entries)) % len(a.entries)
		if estimator == "" || a.entries[i].Estimator == estimator {
			out = append(out, a.entries[i])
		}
	}
	for i, j := 0, len(out)-1; i < j; i, j = i+1, j-1 {
		out[i], out[j] = out[j], out[i]
	}
	return out
}
