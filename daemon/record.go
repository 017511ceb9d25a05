package daemon

import (
	"context"
	"errors"
	"fmt"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"surmise/daemon/recording"
)

// CheckSubjects checks subject filters for a recording: each a valid NATS
// subject of dot-separated tokens, where "*" matches one token and a final
// ">" one or more; and no two that overlap — a message matching both would
// be recorded twice.
func CheckSubjects(subjects []string) error {
	if len(subjects) == 0 {
		return errors.New("no subject to record")
	}
	for i, s := range subjects {
		toks := strings.Split(s, ".")
		for j, t := range toks {
			switch {
			case t == "":
				return fmt.Errorf("subject %q: empty token", s)
			case strings.ContainsAny(t, " \t\r\n"):
				return fmt.Errorf("subject %q: white space", s)
			case t == ">" && j != len(toks)-1:
				return fmt.Errorf("subject %q: \">\" must be the last token", s)
			case len(t) > 1 && strings.ContainsAny(t, "*>"):
				return fmt.Errorf("subject %q: a wildcard must be a whole token", s)
			}
		}
		for _, o := range subjects[:i] {
			if subjectsOverlap(toks, strings.Split(o, ".")) {
				return fmt.Errorf("subjects %q and %q overlap: a message on both would be recorded twice", o, s)
			}
		}
	}
	return nil
}

// subjectsOverlap reports whether some subject matches both filters.
func subjectsOverlap(a, b []string) bool {
	for i := 0; ; i++ {
		switch {
		case i == len(a) && i == len(b):
			return true
		case i == len(a) || i == len(b):
			return false
		case a[i] == ">" || b[i] == ">":
			return true
		case a[i] == "*" || b[i] == "*" || a[i] == b[i]:
			continue
		default:
			return false
		}
	}
}

// Recorder writes the messages of some subjects to a bus recording (the
// format of package recording), each with the time it was received. The
// clock is read and the line written under one lock, so the receive times
// in the file never go back, whichever subscription a message came on.
type Recorder struct {
	w      *recording.Writer
	subs   []*nats.Subscription
	closed []<-chan nats.SubStatus // one per subscription, closed when it is

	mu     sync.Mutex
	n      int
	err    error
	failed chan struct{} // closed at the first failed write
}

// StartRecorder subscribes nc to subjects (see CheckSubjects) and records
// every message to w. It returns once the server has the subscriptions, so
// that nothing published afterwards is missed.
func StartRecorder(nc *nats.Conn, w *recording.Writer, subjects []string) (*Recorder, error) {
	if err := CheckSubjects(subjects); err != nil {
		return nil, fmt.Errorf("record: %w", err)
	}
	r := &Recorder{w: w, failed: make(chan struct{})}
	for _, s := range subjects {
		sub, err := nc.Subscribe(s, r.handle)
		if err != nil {
			r.unsubscribe()
			return nil, fmt.Errorf("record: subscribing to %s: %w", s, err)
		}
		// A recorder must not be the slow consumer that loses messages to
		// a burst: no limit on what waits for the writer.
		if err := sub.SetPendingLimits(-1, -1); err != nil {
			r.unsubscribe()
			return nil, fmt.Errorf("record: %s: %w", s, err)
		}
		r.subs = append(r.subs, sub)
		r.closed = append(r.closed, sub.StatusChanged(nats.SubscriptionClosed))
	}
	if err := nc.Flush(); err != nil {
		r.unsubscribe()
		return nil, fmt.Errorf("record: subscribing: %w", err)
	}
	return r, nil
}

func (r *Recorder) handle(m *nats.Msg) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.err != nil {
		return
	}
	if err := r.w.Write(time.Now(), m.Subject, m.Data); err != nil {
		r.err = err
		close(r.failed)
		return
	}
	r.n++
}

func (r *Recorder) unsubscribe() {
	for _, s := range r.subs {
		s.Unsubscribe()
	}
}

// Failed is closed when a write fails; Stop then returns the error.
func (r *Recorder) Failed() <-chan struct{} { return r.failed }

// Count returns the number of messages written.
func (r *Recorder) Count() int {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.n
}

// Stop unsubscribes, writes the messages already received, closes the
// writer and returns the first error of a write or of the close.
func (r *Recorder) Stop() error {
	var errs []error
	for _, s := range r.subs {
		// Drain hands over what was received before it stops.
		if err := s.Drain(); err != nil && !errors.Is(err, nats.ErrConnectionClosed) && !errors.Is(err, nats.ErrBadSubscription) {
			errs = append(errs, err)
		}
	}
	timeout := time.NewTimer(drainTimeout)
	defer timeout.Stop()
wait:
	for _, c := range r.closed {
		select {
		case <-c:
		case <-timeout.C:
			errs = append(errs, fmt.Errorf("record: subscriptions not drained after %v", drainTimeout))
			break wait
		}
	}
	r.mu.Lock()
	if r.err != nil {
		errs = append(errs, r.err)
	}
	r.err = errors.New("record: stopped")
	r.mu.Unlock()
	if err := r.w.Close(); err != nil {
		errs = append(errs, err)
	}
	return errors.Join(errs...)
}

// RecordStreamOptions describe a JetStream stream that records subjects on
// the server, for a fleet: it keeps recording while no recorder runs, and
// any number of readers export from it.
type RecordStreamOptions struct {
	Name     string   // the stream's name
	Subjects []string // the subjects it captures (see CheckSubjects)
	// MaxAge and MaxBytes bound what it keeps; the oldest messages go first.
	// At least one is required: a recording stream must not grow for ever.
	MaxAge   time.Duration
	MaxBytes int64
	// Replicas is the number of copies in a cluster; zero means 1.
	Replicas int
}

// EnsureRecordStream creates the stream of opts, or updates it to opts when
// it exists, and returns its configuration as the server holds it.
func EnsureRecordStream(ctx context.Context, nc *nats.Conn, opts RecordStreamOptions) (jetstream.StreamConfig, error) {
	if err := CheckSubjects(opts.Subjects); err != nil {
		return jetstream.StreamConfig{}, fmt.Errorf("record stream: %w", err)
	}
	if opts.MaxAge <= 0 && opts.MaxBytes <= 0 {
		return jetstream.StreamConfig{}, errors.New("record stream: give a maximum age or size: a recording stream must not grow for ever")
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return jetstream.StreamConfig{}, fmt.Errorf("record stream: %w", err)
	}
	cfg := jetstream.StreamConfig{
		Name:        opts.Name,
		Description: "bus recording by surmise record",
		Subjects:    opts.Subjects,
		Retention:   jetstream.LimitsPolicy,
		Discard:     jetstream.DiscardOld,
		MaxAge:      opts.MaxAge,
		MaxBytes:    opts.MaxBytes,
		Storage:     jetstream.FileStorage,
		Replicas:    max(opts.Replicas, 1),
	}
	if cfg.MaxBytes == 0 {
		cfg.MaxBytes = -1
	}
	s, err := js.CreateOrUpdateStream(ctx, cfg)
	if err != nil {
		return jetstream.StreamConfig{}, fmt.Errorf("record stream %s: %w", opts.Name, err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		return jetstream.StreamConfig{}, fmt.Errorf("record stream %s: %w", opts.Name, err)
	}
	return info.Config, nil
}

// ExportStream writes the messages the stream holds now to w, oldest first,
// each with the time the server stored it as its receive time, and returns
// how many it wrote. Messages stored after the export began are left for
// the next one.
func ExportStream(ctx context.Context, nc *nats.Conn, name string, w *recording.Writer) (int, error) {
	js, err := jetstream.New(nc)
	if err != nil {
		return 0, fmt.Errorf("export %s: %w", name, err)
	}
	s, err := js.Stream(ctx, name)
	if err != nil {
		return 0, fmt.Errorf("export %s: %w", name, err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		return 0, fmt.Errorf("export %s: %w", name, err)
	}
	last := info.State.LastSeq
	if info.State.Msgs == 0 {
		return 0, nil
	}
	c, err := s.OrderedConsumer(ctx, jetstream.OrderedConsumerConfig{DeliverPolicy: jetstream.DeliverAllPolicy})
	if err != nil {
		return 0, fmt.Errorf("export %s: %w", name, err)
	}
	n := 0
	for {
		batch, err := c.Fetch(256, jetstream.FetchMaxWait(5*time.Second))
		if err != nil {
			return n, fmt.Errorf("export %s: %w", name, err)
		}
		got := 0
		for m := range batch.Messages() {
			got++
			md, err := m.Metadata()
			if err != nil {
				return n, fmt.Errorf("export %s: %w", name, err)
			}
			if md.Sequence.Stream > last {
				return n, nil
			}
			if err := w.Write(md.Timestamp, m.Subject(), m.Data()); err != nil {
				return n, err
			}
			n++
			if md.Sequence.Stream == last || md.NumPending == 0 {
				return n, nil
			}
		}
		if err := batch.Error(); err != nil {
			return n, fmt.Errorf("export %s: %w", name, err)
		}
		if got == 0 {
			return n, fmt.Errorf("export %s: no message within 5 s, %d written of sequence up to %d", name, n, last)
		}
		if err := ctx.Err(); err != nil {
			return n, err
		}
	}
}
