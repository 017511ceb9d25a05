// Package lease gives a process exclusive, expiring ownership of named
// things (an estimator, say) among processes that share a NATS server with
// JetStream.
//
// A lease is one entry of a JetStream key-value bucket: the key names the
// thing, the value names the owner (instance id, host, pid, process start,
// and when it took the lease). It is taken by compare-and-set — Create,
// which succeeds only when the key is absent or deleted — and kept by
// compare-and-set writes on the revision last written, every Renew
// interval. The bucket's time-to-live removes an entry its owner stopped
// renewing, so a process that dies, hangs or loses the server loses its
// leases after the TTL and another may take them.
//
// One [Manager] serves any number of leases of one bucket from one renewal
// goroutine and one watch of the bucket: there is no goroutine per lease,
// and the renewals of a round go out together (asynchronous publishes whose
// acknowledgements are collected at once), so a round costs about one round
// trip however many leases a process holds.
// [Manager.Acquire] tries once and returns a [*HeldError] naming the owner
// when someone else holds the key; [Manager.Standby] registers a wish and
// the Manager takes the key as soon as it is free (a clean release is seen
// at once through the watch, a lapse within a Renew interval of the TTL).
// A held lease that cannot be renewed in time, or that someone else took,
// is lost: [Lease.Lost] closes, and the owner must stop acting for the key.
// [Lease.Release] and [Manager.Close] delete the entry so that a standby
// takes over at once.
//
// Safety rests on durations only, never on clocks agreeing across hosts: a
// holder gives a lease up when Renew·2 have passed since the sending of its
// last successful renewal, while the server keeps that renewal for the
// full TTL (≥ Renew·3) after receiving it, so the holder stops at least a
// Renew interval before anyone else can take over.
package lease

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/nats-io/nuid"
)

// DefaultTTL is the time-to-live of a lease whose owner stopped renewing.
// With the default renewal (a third of it) a standby takes over about
// 6–8 s after its owner died.
const DefaultTTL = 6 * time.Second

// Owner identifies a lease holder. It is the entry's value, as JSON.
type Owner struct {
	// Instance is unique per process start (a random id).
	Instance string `json:"instance"`
	// Host is the holder's host name.
	Host string `json:"host"`
	// PID is the holder's process id.
	PID int `json:"pid"`
	// Started is when the holding process started.
	Started time.Time `json:"started"`
	// Since is when this lease was taken (by the holder's wall clock).
	Since time.Time `json:"since,omitzero"`
}

// String describes the owner for messages: "instance X (host H, pid P)".
func (o Owner) String() string {
	return fmt.Sprintf("instance %s (host %s, pid %d)", o.Instance, o.Host, o.PID)
}

// Self returns an Owner for this process: a new random instance id, the host
// name, the pid and now as the start time.
func Self() Owner {
	host, err := os.Hostname()
	if err != nil {
		host = "unknown"
	}
	return Owner{Instance: nuid.Next(), Host: host, PID: os.Getpid(), Started: time.Now().UTC()}
}

// HeldError says that another owner holds a lease.
type HeldError struct {
	Key   string
	Owner Owner
	TTL   time.Duration
}

// Error reads "KEY: held by instance X (host H, pid P) since T; ...".
func (e *HeldError) Error() string {
	since := "an unknown time"
	if !e.Owner.Since.IsZero() {
		since = e.Owner.Since.UTC().Format(time.RFC3339)
	}
	return fmt.Sprintf("%s: held by %s since %s; it lapses %v after its holder stops renewing it",
		e.Key, e.Owner, since, e.TTL)
}

// ErrClosed is returned by a Manager after Close.
var ErrClosed = errors.New("lease: manager closed")

// Config configures a Manager.
type Config struct {
	// Bucket is the key-value bucket of the leases (created when absent):
	// one per group of processes that compete for the same keys.
	Bucket string
	// TTL is how long an entry outlives its last renewal; zero means
	// DefaultTTL. An existing bucket keeps its own TTL, and the Manager
	// adopts it (every holder must renew on the same clock).
	TTL time.Duration
	// Renew is the renewal interval; zero means TTL/3. It must be at most
	// TTL/3, so that two renewals may fail before a lease is given up.
	Renew time.Duration
	// Owner is written into each lease taken; zero means Self().
	Owner Owner
	// Changed, when set, is called from the renewal goroutine whenever a
	// lease of this Manager is taken (held true) or ends (held false, by
	// loss or release). It must not block.
	Changed func(key string, held bool)
	// Log receives warnings (a lost lease, a failing renewal); nil means
	// none.
	Log *slog.Logger
}

// Manager holds and renews the leases of one bucket for one process.
type Manager struct {
	js      jetstream.JetStream
	kv      jetstream.KeyValue
	put     string // the subject prefix of the bucket's entries, "$KV.<bucket>."
	ttl     time.Duration
	renew   time.Duration
	self    Owner
	changed func(string, bool)
	log     *slog.Logger

	mu     sync.Mutex
	leases map[string]*Lease // held or waiting
	closed bool

	base   time.Time     // origin of the monotonic deadlines of the leases
	wake   chan struct{} // a waiting key may be free: try now
	cancel context.CancelFunc
	done   chan struct{}
}

// Open binds (or creates) the bucket and starts the renewal goroutine.
func Open(ctx context.Context, nc *nats.Conn, cfg Config) (*Manager, error) {
	if cfg.Bucket == "" {
		return nil, errors.New("lease: no bucket name")
	}
	ttl := cfg.TTL
	if ttl == 0 {
		ttl = DefaultTTL
	}
	if ttl < time.Second {
		return nil, fmt.Errorf("lease: TTL %v shorter than the server's 1 s resolution", ttl)
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, fmt.Errorf("lease: %w", err)
	}
	kv, err := js.KeyValue(ctx, cfg.Bucket)
	if errors.Is(err, jetstream.ErrBucketNotFound) {
		kv, err = js.CreateKeyValue(ctx, jetstream.KeyValueConfig{
			Bucket:      cfg.Bucket,
			Description: "leases: one owner per key, renewed, expiring",
			History:     1,
			TTL:         ttl,
			// Expiry leaves a marker, so that standbys see a lapse as
			// soon as the server removes the entry.
			LimitMarkerTTL: max(ttl, time.Second),
		})
		if errors.Is(err, jetstream.ErrBucketExists) { // created meanwhile
			kv, err = js.KeyValue(ctx, cfg.Bucket)
		}
	}
	if err != nil {
		return nil, fmt.Errorf("lease: bucket %s: %w", cfg.Bucket, err)
	}
	st, err := kv.Status(ctx)
	if err != nil {
		return nil, fmt.Errorf("lease: bucket %s: %w", cfg.Bucket, err)
	}
	if st.TTL() <= 0 {
		return nil, fmt.Errorf("lease: bucket %s has no TTL, so a dead holder would keep its leases forever", cfg.Bucket)
	}
	ttl = st.TTL()
	renew := cfg.Renew
	if renew == 0 || renew > ttl/3 {
		renew = ttl / 3
	}
	self := cfg.Owner
	if self.Instance == "" {
		self = Self()
	}
	log := cfg.Log
	if log == nil {
		log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	// The watch lives as long as the Manager, not as long as ctx.
	lctx, cancel := context.WithCancel(context.Background())
	w, err := kv.WatchAll(lctx, jetstream.MetaOnly())
	if err != nil {
		cancel()
		return nil, fmt.Errorf("lease: watching bucket %s: %w", cfg.Bucket, err)
	}
	m := &Manager{
		js: js, kv: kv, put: "$KV." + cfg.Bucket + ".", ttl: ttl, renew: renew, self: self, changed: cfg.Changed, log: log,
		leases: map[string]*Lease{},
		base:   time.Now(),
		wake:   make(chan struct{}, 1),
		cancel: cancel,
		done:   make(chan struct{}),
	}
	go m.loop(lctx, w)
	return m, nil
}

// TTL is the bucket's time-to-live.
func (m *Manager) TTL() time.Duration { return m.ttl }

// Renew is the renewal interval.
func (m *Manager) Renew() time.Duration { return m.renew }

// Self is the owner this Manager writes.
func (m *Manager) Self() Owner { return m.self }

// Holder returns the current owner of key, or ok false when nobody holds it.
func (m *Manager) Holder(ctx context.Context, key string) (o Owner, ok bool, err error) {
	e, err := m.kv.Get(ctx, key)
	if errors.Is(err, jetstream.ErrKeyNotFound) || errors.Is(err, jetstream.ErrKeyDeleted) {
		return Owner{}, false, nil
	}
	if err != nil {
		return Owner{}, false, fmt.Errorf("lease %s: %w", key, err)
	}
	if err := json.Unmarshal(e.Value(), &o); err != nil {
		return Owner{}, true, fmt.Errorf("lease %s: owner unreadable: %w", key, err)
	}
	return o, true, nil
}

// Acquire takes the lease of key now, or returns a *HeldError naming its
// owner. The Manager renews it until Release, Close or loss.
func (m *Manager) Acquire(ctx context.Context, key string) (*Lease, error) {
	l, err := m.register(key)
	if err != nil {
		return nil, err
	}
	l.op.Lock()
	took, err := m.tryTake(ctx, l)
	l.op.Unlock()
	if err == nil && !took {
		err = m.heldError(ctx, key)
	}
	if err != nil {
		m.mu.Lock()
		delete(m.leases, key)
		m.mu.Unlock()
		l.end(false)
		return nil, err
	}
	return l, nil
}

// Standby registers a wish for key and returns at once: the Manager takes
// the lease as soon as it is free, and [Lease.Acquired] closes then.
func (m *Manager) Standby(key string) (*Lease, error) {
	l, err := m.register(key)
	if err != nil {
		return nil, err
	}
	m.poke()
	return l, nil
}

func (m *Manager) register(key string) (*Lease, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if m.closed {
		return nil, ErrClosed
	}
	if _, dup := m.leases[key]; dup {
		return nil, fmt.Errorf("lease %s: already held or awaited by this process", key)
	}
	l := &Lease{m: m, key: key, acquired: make(chan struct{}), lost: make(chan struct{}), ended: make(chan struct{})}
	m.leases[key] = l
	return l, nil
}

func (m *Manager) heldError(ctx context.Context, key string) error {
	o, ok, err := m.Holder(ctx, key)
	if err != nil {
		return err
	}
	if !ok { // lapsed between the attempt and the look
		o = Owner{Instance: "unknown", Host: "unknown"}
	}
	return &HeldError{Key: key, Owner: o, TTL: m.ttl}
}

func (m *Manager) poke() {
	select {
	case m.wake <- struct{}{}:
	default:
	}
}

// tryTake creates the entry of l. Called with l.op held. It reports false
// without error when the key is held by someone else.
func (m *Manager) tryTake(ctx context.Context, l *Lease) (bool, error) {
	if l.state != waiting {
		return l.state == held, nil
	}
	o := m.self
	o.Since = time.Now().UTC()
	val, _ := json.Marshal(o)
	sent := time.Now()
	rev, err := m.kv.Create(ctx, l.key, val)
	if errors.Is(err, jetstream.ErrKeyExists) {
		// Our own entry, left by a tenure of this Manager that was given
		// up (a stalled server): nobody wrote since, so it is ours to
		// take back, by compare-and-set on its revision.
		e, gerr := m.kv.Get(ctx, l.key)
		var o Owner
		if gerr != nil || json.Unmarshal(e.Value(), &o) != nil || o.Instance != m.self.Instance {
			return false, nil
		}
		sent = time.Now()
		if rev, err = m.kv.Update(ctx, l.key, val, e.Revision()); err != nil {
			return false, nil
		}
	} else if err != nil {
		return false, fmt.Errorf("lease %s: %w", l.key, err)
	}
	l.rev, l.since, l.state = rev, o.Since, held
	l.renewed(sent)
	l.val = val
	close(l.acquired)
	if m.changed != nil {
		m.changed(l.key, true)
	}
	return true, nil
}

// loop renews each held lease every Renew interval, looking every half
// interval (so a failed renewal is retried, and a lease given up, within
// half an interval), tries waiting ones at each look, and tries a waiting
// one at once when the watch shows its key freed.
func (m *Manager) loop(ctx context.Context, w jetstream.KeyWatcher) {
	defer close(m.done)
	defer w.Stop()
	t := time.NewTicker(m.renew / 2)
	defer t.Stop()
	updates := w.Updates()
	for {
		select {
		case <-ctx.Done():
			return
		case e, ok := <-updates:
			if !ok {
				updates = nil // the watch ended (connection closed); ticks go on
				continue
			}
			if e != nil && e.Operation() != jetstream.KeyValuePut {
				m.mu.Lock()
				l := m.leases[e.Key()]
				m.mu.Unlock()
				if l != nil {
					m.step(ctx, l)
				}
			}
		case <-m.wake:
			m.each(ctx)
		case <-t.C:
			m.each(ctx)
		}
	}
}

func (m *Manager) each(ctx context.Context) {
	m.mu.Lock()
	ls := make([]*Lease, 0, len(m.leases))
	for _, l := range m.leases {
		ls = append(ls, l)
	}
	m.mu.Unlock()
	m.renewAll(ctx, ls)
	for _, l := range ls {
		if ctx.Err() != nil {
			return
		}
		m.step(ctx, l) // waiting ones; held ones were renewed above
	}
}

// renewAll renews every held lease of ls that is due, all at once: the
// compare-and-set writes go out as asynchronous publishes and their
// acknowledgements are collected together, so that a round costs about one
// round trip however many leases the process holds.
func (m *Manager) renewAll(ctx context.Context, ls []*Lease) {
	type pending struct {
		l    *Lease
		sent time.Time
		ack  jetstream.PubAckFuture
	}
	var ps []pending
	for _, l := range ls {
		l.op.Lock()
		if l.state != held || time.Since(l.lastOK) < m.renew*3/4 {
			l.op.Unlock()
			continue
		}
		sent := time.Now()
		ack, err := m.js.PublishMsgAsync(&nats.Msg{Subject: m.put + l.key, Data: l.val},
			jetstream.WithExpectLastSequencePerSubject(l.rev))
		if err != nil {
			m.renewFailed(l, err)
			l.op.Unlock()
			continue
		}
		ps = append(ps, pending{l, sent, ack}) // l.op stays locked until its answer
	}
	wait := time.NewTimer(m.renew / 2)
	defer wait.Stop()
	expired := false
	for _, p := range ps {
		if !expired {
			select {
			case a := <-p.ack.Ok():
				p.l.rev = a.Sequence
				p.l.renewed(p.sent)
			case err := <-p.ack.Err():
				m.renewFailed(p.l, err)
			case <-wait.C:
				expired = true
			case <-ctx.Done():
				expired = true
			}
		}
		if expired && ctx.Err() == nil {
			m.renewFailed(p.l, context.DeadlineExceeded)
		}
		p.l.op.Unlock()
	}
}

// renewFailed handles a failed renewal of l (l.op held): lost when someone
// else wrote the entry or the lease is past its validity, else retried at
// the next look.
func (m *Manager) renewFailed(l *Lease, err error) {
	var api *jetstream.APIError
	if errors.As(err, &api) && (api.ErrorCode == jetstream.JSErrCodeStreamWrongLastSequence || api.ErrorCode == jetstream.JSErrCodeStreamWrongLastSequenceConstant) {
		// A renewal whose answer we gave up on may have been written:
		// the entry then holds this very tenure's value (instance and
		// time taken), which nobody else writes. Adopt its revision.
		ctx, cancel := context.WithTimeout(context.Background(), m.renew/2)
		defer cancel()
		if e, gerr := m.kv.Get(ctx, l.key); gerr == nil && bytes.Equal(e.Value(), l.val) {
			l.rev = e.Revision()
			return
		}
		m.lose(l, "taken or lapsed", err)
		return
	}
	if since := time.Since(l.lastOK); since >= 2*m.renew {
		m.lose(l, fmt.Sprintf("not renewed for %v", since.Round(time.Millisecond)), err)
		return
	}
	l.warn(m.log, "lease: renewal failed, retrying", err)
}

// step renews l when held, tries to take it when waiting.
func (m *Manager) step(ctx context.Context, l *Lease) {
	l.op.Lock()
	defer l.op.Unlock()
	rctx, cancel := context.WithTimeout(ctx, m.renew/2)
	defer cancel()
	switch l.state {
	case waiting:
		if _, err := m.tryTake(rctx, l); err != nil && ctx.Err() == nil {
			l.warn(m.log, "lease: trying to take", err)
		}
	case held:
		// Renewed by renewAll. (A renewal that succeeds after Held turned
		// false is still sound: the compare-and-set proves that nobody
		// took the key since our last write.)
	}
}

// lose ends a held lease that is no longer ours. Called with l.op held.
func (m *Manager) lose(l *Lease, why string, err error) {
	m.log.Warn("lease lost: stop acting for it", "key", l.key, "reason", why, "error", err)
	m.mu.Lock()
	if m.leases[l.key] == l {
		delete(m.leases, l.key)
	}
	m.mu.Unlock()
	l.end(true)
}

// Close releases every held lease (deleting their entries, so that
// standbys take over at once), gives up waiting ones, and stops the renewal
// goroutine. It returns the first release error; leases it could not delete
// lapse after the TTL.
func (m *Manager) Close(ctx context.Context) error {
	m.mu.Lock()
	if m.closed {
		m.mu.Unlock()
		<-m.done
		return nil
	}
	m.closed = true
	ls := make([]*Lease, 0, len(m.leases))
	for _, l := range m.leases {
		ls = append(ls, l)
	}
	m.mu.Unlock()
	m.cancel()
	<-m.done
	var first error
	for _, l := range ls {
		if err := l.Release(ctx); err != nil && first == nil {
			first = err
		}
	}
	return first
}

type leaseState int

const (
	waiting leaseState = iota
	held
	over
)

// Lease is one tenure of one key: taken once, then renewed until released
// or lost. A lost or released Lease stays over; wait again with a new
// Standby.
type Lease struct {
	m   *Manager
	key string

	op     sync.Mutex // serialises the network operations on this lease
	state  leaseState
	rev    uint64
	val    []byte
	since  time.Time
	lastOK time.Time // when the last successful write was sent
	// validUntil is lastOK + 2·Renew in nanoseconds since m.base: Held
	// turns false then, whether or not the loop has noticed.
	validUntil atomic.Int64
	lastWarn   time.Time

	acquired, lost, ended chan struct{}
}

// Key is the lease's key.
func (l *Lease) Key() string { return l.key }

// Acquired closes when the lease is taken (at once for Acquire).
func (l *Lease) Acquired() <-chan struct{} { return l.acquired }

// Lost closes when a held lease is lost: the owner must stop acting for the
// key at once. It does not close on Release.
func (l *Lease) Lost() <-chan struct{} { return l.lost }

// Done closes when the lease is over, by loss, release or Close.
func (l *Lease) Done() <-chan struct{} { return l.ended }

// Held reports whether the lease is held now: taken, not over, and renewed
// within the last two Renew intervals. Check it before each act for the key.
func (l *Lease) Held() bool {
	if int64(time.Since(l.m.base)) >= l.validUntil.Load() {
		return false
	}
	select {
	case <-l.acquired:
	default:
		return false
	}
	select {
	case <-l.ended:
		return false
	default:
		return true
	}
}

// Since is when the lease was taken; zero while waiting.
func (l *Lease) Since() time.Time {
	l.op.Lock()
	defer l.op.Unlock()
	return l.since
}

// Release gives the lease up and deletes its entry when it is still ours,
// so that a standby takes over at once; a waiting lease stops waiting.
// Releasing twice is harmless.
func (l *Lease) Release(ctx context.Context) error {
	l.op.Lock()
	defer l.op.Unlock()
	m := l.m
	m.mu.Lock()
	if m.leases[l.key] == l {
		delete(m.leases, l.key)
	}
	m.mu.Unlock()
	was := l.state
	l.end(false)
	if was != held {
		return nil
	}
	err := m.kv.Delete(ctx, l.key, jetstream.LastRevision(l.rev))
	if err != nil && !errors.Is(err, jetstream.ErrKeyRevisionMismatch) && !errors.Is(err, jetstream.ErrKeyExists) {
		return fmt.Errorf("lease %s: release: %w (it lapses after %v)", l.key, err, m.ttl)
	}
	return nil
}

// renewed records a successful write sent at sent. Called with l.op held.
func (l *Lease) renewed(sent time.Time) {
	l.lastOK = sent
	l.validUntil.Store(int64(sent.Sub(l.m.base) + 2*l.m.renew))
}

// end marks the lease over; lost says whether it was lost. Called with l.op
// held, or before the lease was published.
func (l *Lease) end(lost bool) {
	if l.state == over {
		return
	}
	wasHeld := l.state == held
	l.state = over
	if lost {
		close(l.lost)
	}
	close(l.ended)
	if wasHeld && l.m.changed != nil {
		l.m.changed(l.key, false)
	}
}

// warn logs err at most once per TTL for this lease.
func (l *Lease) warn(log *slog.Logger, msg string, err error) {
	now := time.Now()
	if now.Sub(l.lastWarn) < l.m.ttl {
		return
	}
	l.lastWarn = now
	log.Warn(msg, "key", l.key, "error", err)
}
