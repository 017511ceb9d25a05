package daemon

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
)

// DefaultEmbeddedPort is the loopback port the embedded NATS server listens
// on when it is free: the standard NATS client port, so that other tools on
// the machine connect to it without options.
const DefaultEmbeddedPort = 4222

// EmbeddedOptions configures the in-process NATS server. The zero value,
// apart from StoreDir, means defaults.
type EmbeddedOptions struct {
	// Port on 127.0.0.1 (the server never listens on other addresses).
	// Zero means DefaultEmbeddedPort if it is free, otherwise a random free
	// port; -1 means a random free port; any other value that port or an
	// error.
	Port int

	// StoreDir is the JetStream storage directory; it is required, so that
	// the server never writes to a directory the caller did not choose.
	StoreDir string

	// JetStreamMaxMemory and JetStreamMaxStore limit JetStream's memory and
	// file storage, in bytes. Zero means 64 MiB and 1 GiB. (The server's
	// own defaults are 75 % of the machine's memory and of the free disk.)
	JetStreamMaxMemory, JetStreamMaxStore int64

	// ServerName names the server in monitoring output; zero means
	// "surmise".
	ServerName string

	// ReadyTimeout bounds the wait until the server accepts connections;
	// zero means 5 s.
	ReadyTimeout time.Duration

	// Log receives one line with the server's URL; nil means no logging.
	Log *slog.Logger

	// LocalPassword, when set, locks the server: clients log in as
	// LocalUser with this password and may do anything, while clients
	// without credentials get the Anonymous permissions (nil: none at
	// all). Empty leaves the server open to every local client.
	LocalPassword string
	Anonymous     *server.Permissions
}

// startLog keeps the embedded server's warnings and errors, so that a server
// that does not come up says why (JetStream's store unwritable, say).
type startLog struct {
	mu    sync.Mutex
	lines []string
	fatal bool
}

func (l *startLog) add(level, format string, v []any) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if len(l.lines) < 20 {
		l.lines = append(l.lines, level+": "+fmt.Sprintf(format, v...))
	}
}

func (l *startLog) Noticef(string, ...any)         {}
func (l *startLog) Debugf(string, ...any)          {}
func (l *startLog) Tracef(string, ...any)          {}
func (l *startLog) Warnf(format string, v ...any)  { l.add("warning", format, v) }
func (l *startLog) Errorf(format string, v ...any) { l.add("error", format, v) }
func (l *startLog) Fatalf(format string, v ...any) {
	l.add("fatal", format, v)
	l.mu.Lock()
	l.fatal = true
	l.mu.Unlock()
}

// failed returns what the server said, and whether it gave up.
func (l *startLog) failed() (string, bool) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return strings.Join(l.lines, "; "), l.fatal
}

// StartEmbedded starts an in-process NATS server with JetStream on a
// loopback port and returns once it accepts connections. The server does not
// install signal handlers (NoSigs: SIGHUP stays ours) and does not log. The
// caller stops it with Shutdown and WaitForShutdown; clients in the same
// process connect with [BusOptions].Embedded, others at its ClientURL.
func StartEmbedded(opts EmbeddedOptions) (*server.Server, error) {
	if opts.StoreDir == "" {
		return nil, errors.New("embedded NATS server: no JetStream store directory given")
	}
	if opts.Port < -1 || opts.Port > 65535 {
		return nil, fmt.Errorf("embedded NATS server: port %d out of range", opts.Port)
	}
	port := opts.Port
	if port == 0 {
		port = DefaultEmbeddedPort
		if ln, err := net.Listen("tcp", net.JoinHostPort("127.0.0.1", strconv.Itoa(port))); err != nil {
			port = -1 // taken: let the server pick one
			if opts.Log != nil {
				opts.Log.Warn("embedded NATS server: the default port is taken; listening on a free one (local clients find it in the local access files)", "port", DefaultEmbeddedPort, "error", err)
			}
		} else {
			ln.Close()
		}
	} else if port > 0 {
		// A port asked for by number is that port or an error, said now
		// rather than after a wait.
		ln, err := net.Listen("tcp", net.JoinHostPort("127.0.0.1", strconv.Itoa(port)))
		if err != nil {
			return nil, fmt.Errorf("embedded NATS server: port %d on 127.0.0.1 is not free (another daemon or NATS server?); choose another port, or -1 for any free one: %w", port, err)
		}
		ln.Close()
	}
	name := opts.ServerName
	if name == "" {
		name = "surmise"
	}
	maxMem, maxStore := opts.JetStreamMaxMemory, opts.JetStreamMaxStore
	if maxMem == 0 {
		maxMem = 64 << 20
	}
	if maxStore == 0 {
		maxStore = 1 << 30
	}
	timeout := opts.ReadyTimeout
	if timeout == 0 {
		timeout = 5 * time.Second
	}
	sopts := &server.Options{
		ServerName:         name,
		Host:               "127.0.0.1",
		Port:               port,
		NoSigs:             true,
		NoLog:              true,
		JetStream:          true,
		StoreDir:           opts.StoreDir,
		JetStreamMaxMemory: maxMem,
		JetStreamMaxStore:  maxStore,
	}
	if opts.LocalPassword != "" {
		anon := opts.Anonymous
		if anon == nil {
			anon = &server.Permissions{Publish: &server.SubjectPermission{Deny: []string{">"}}, Subscribe: &server.SubjectPermission{Deny: []string{">"}}}
		}
		sopts.Users = []*server.User{
			{Username: LocalUser, Password: opts.LocalPassword},
			// The user of clients without credentials (NoAuthUser); its
			// password is never used, and is random so nobody can log in
			// with it.
			{Username: anonymousUser, Password: opts.LocalPassword + "-anonymous", Permissions: anon},
		}
		sopts.NoAuthUser = anonymousUser
	}
	ns, err := server.NewServer(sopts)
	if err != nil {
		return nil, fmt.Errorf("embedded NATS server: %w", err)
	}
	said := &startLog{}
	ns.SetLogger(said, false, false)
	ns.Start()
	// Ready, or given up (a fatal start-up error: the server then never
	// accepts clients), or out of time — whichever comes first.
	deadline := time.Now().Add(timeout)
	for !ns.ReadyForConnections(50 * time.Millisecond) {
		msg, fatal := said.failed()
		if fatal || time.Now().After(deadline) {
			ns.Shutdown()
			ns.WaitForShutdown()
			if msg == "" {
				msg = fmt.Sprintf("not ready after %v", timeout)
			}
			return nil, fmt.Errorf("embedded NATS server on 127.0.0.1 port %d, store %s: %s", port, opts.StoreDir, msg)
		}
	}
	if opts.Log != nil {
		opts.Log.Info("embedded NATS server started", "url", ns.ClientURL(), "store", opts.StoreDir)
	}
	return ns, nil
}

// BusOptions says how to reach the NATS server. Either URL or Embedded is
// required; the other fields are optional.
type BusOptions struct {
	// URL is a server URL, or several separated by commas
	// ("nats://a:4222,nats://b:4222"). Ignored when Embedded is set.
	URL string

	// Embedded connects in-process to this server, without a socket.
	Embedded *server.Server

	// CredsFile is a user credentials file (a JWT and its NKey seed).
	CredsFile string
	// NKeyFile is a file holding a user NKey seed.
	NKeyFile string
	// UserFile is a file of one line "USER:PASSWORD" (mode 0600), such as
	// the nats.user a daemon writes for local clients (see LocalAccess).
	UserFile string
	// User and Password log in with a password given directly (the
	// daemon's own connection to its embedded server).
	User, Password string

	// TLSCA is a PEM file of the certificate authorities that sign the
	// server's certificate; TLSCert and TLSKey are the client certificate
	// and key, for servers that verify clients. Setting any enables TLS.
	TLSCA, TLSCert, TLSKey string

	// Name is the connection's name in the server's monitoring; zero means
	// "surmise".
	Name string

	// ReconnectWait is the pause between reconnection attempts to the same
	// server; zero means 2 s. ReconnectJitter is the upper bound of a random
	// delay added to it, so that a fleet does not reconnect in step; zero
	// means 500 ms.
	ReconnectWait, ReconnectJitter time.Duration
}

// Bus is a NATS connection with handlers that log and update the bus
// metrics. Publish and subscribe through [Bus.Conn]; close with
// [Bus.Close], which drains.
type Bus struct {
	nc      *nats.Conn
	closed  chan struct{} // closed by the closed handler
	closing atomic.Bool   // set by Close: the disconnect that follows is ours
	log     *slog.Logger

	warnLimit logLimiter // bus errors (a slow consumer repeats them)
	dropMu    sync.Mutex
	dropped   map[*nats.Subscription]int // drops counted so far, per subscription

	// stalled is set while a connected server does not answer (see probe).
	stalled   atomic.Bool
	probeDone chan struct{}
}

// A stalled server — a process stopped or hung, a link that silently
// drops — keeps the TCP connection open, and the client would queue
// publishes into it for as long as its pings allow. The bus probes the
// server every probeEvery with a PING; when no PONG came for stallAfter it
// is stalled: Up turns false (estimates are withheld, /readyz fails,
// surmise_bus_connected is 0) until the server answers again. The client's
// own pings (every second, two outstanding) then drop the connection and
// reconnect, about three seconds after the server's last answer.
const (
	probeEvery = 250 * time.Millisecond
	stallAfter = time.Second
)

// Connect connects to the server of opts. It returns at once even when the
// server cannot be reached yet: the connection keeps retrying, forever, with
// back-off (ReconnectWait plus jitter), and surmise_bus_connected says when
// it is up. Files named in opts are read now, and an unreadable one is an
// error. m and log may be nil.
//
// The reconnect buffer is disabled (nats.ReconnectBufSize(-1)): while
// disconnected, Publish fails at once instead of queueing. An estimate is
// only meaningful at its time; one buffered during an outage and delivered
// after the reconnect would reach subscribers late and out of step with the
// live stream, looking current when it is not. Dropped estimates are the
// honest record of an outage (the estimator's sequence numbers show the
// gap).
func Connect(opts BusOptions, m *Metrics, log *slog.Logger) (*Bus, error) {
	if log == nil {
		log = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	if opts.URL == "" && opts.Embedded == nil {
		return nil, errors.New("bus: no server URL and no embedded server")
	}
	name := opts.Name
	if name == "" {
		name = "surmise"
	}
	wait, jitter := opts.ReconnectWait, opts.ReconnectJitter
	if wait == 0 {
		wait = 2 * time.Second
	}
	if jitter == 0 {
		jitter = 500 * time.Millisecond
	}
	b := &Bus{closed: make(chan struct{}), log: log}
	setConnected := func(up bool) {
		if m != nil {
			m.SetBusConnected(up)
		}
	}
	nopts := []nats.Option{
		nats.Name(name),
		nats.MaxReconnects(-1),
		nats.ReconnectWait(wait),
		nats.ReconnectJitter(jitter, jitter),
		nats.RetryOnFailedConnect(true),
		nats.ReconnectBufSize(-1), // see the doc comment: no stale estimates after a reconnect
		// A silent partition (no FIN, no RST) is noticed within about
		// PingInterval·(MaxPingsOutstanding+1) = 15 s instead of the
		// client's default of minutes, and a write to a stuck socket gives
		// up after a second instead of a minute, so a tick's publish never
		// waits long on a dead link.
		nats.PingInterval(time.Second),
		nats.MaxPingsOutstanding(2),
		nats.FlusherTimeout(time.Second),
		nats.ConnectHandler(func(nc *nats.Conn) {
			setConnected(true)
			log.Info("bus connected", "url", nc.ConnectedUrlRedacted())
		}),
		nats.ReconnectHandler(func(nc *nats.Conn) {
			setConnected(true)
			log.Info("bus reconnected", "url", nc.ConnectedUrlRedacted())
		}),
		nats.DisconnectErrHandler(func(nc *nats.Conn, err error) {
			setConnected(false)
			if b.closing.Load() {
				return // the disconnect of our own Close
			}
			if m != nil {
				m.BusDisconnected()
			}
			log.Warn("bus disconnected", "error", err)
		}),
		nats.ClosedHandler(func(nc *nats.Conn) {
			setConnected(false)
			log.Info("bus connection closed")
			close(b.closed)
		}),
		nats.ErrorHandler(func(nc *nats.Conn, sub *nats.Subscription, err error) {
			subject := ""
			if sub != nil {
				subject = sub.Subject
				if errors.Is(err, nats.ErrSlowConsumer) && m != nil {
					m.BusDropped(DropPendingLimit, b.newlyDropped(sub))
				}
			}
			if ok, held := b.warnLimit.allow(time.Now().UnixNano(), int64(busWarnEvery), ReasonUnknown); ok {
				args := []any{"subject", subject, "error", err}
				if held > 0 {
					args = append(args, "unlogged_since_last", held)
				}
				log.Warn("bus error", args...)
			}
		}),
	}
	auth, err := authOptions(opts)
	if err != nil {
		return nil, err
	}
	nopts = append(nopts, auth...)

	url := opts.URL
	if opts.Embedded != nil {
		url = opts.Embedded.ClientURL()
		nopts = append(nopts, nats.InProcessServer(opts.Embedded))
	}
	nc, err := nats.Connect(url, nopts...)
	if err != nil {
		return nil, fmt.Errorf("bus: connecting to %s: %w", RedactURL(url), err)
	}
	b.nc = nc
	b.probeDone = make(chan struct{})
	go b.probe(m)
	if nc.IsConnected() {
		setConnected(true)
	} else {
		log.Warn("bus not reachable yet, retrying in the background", "url", RedactURL(url))
	}
	return b, nil
}

// ClientOptions checks the credential and TLS files of opts and returns the
// matching client options, for a program that makes its own connection
// (surmise ctl, record, simulate) with the same settings as the daemon's.
func ClientOptions(opts BusOptions) ([]nats.Option, error) { return authOptions(opts) }

// authOptions checks the credential and TLS files of opts and returns the
// matching client options.
func authOptions(opts BusOptions) ([]nats.Option, error) {
	var out []nats.Option
	n := 0
	for _, set := range []bool{opts.CredsFile != "", opts.NKeyFile != "", opts.UserFile != "", opts.User != ""} {
		if set {
			n++
		}
	}
	if n > 1 {
		return nil, errors.New("bus: more than one way to log in given (credentials file, NKey seed file, user file, user); use one")
	}
	if opts.UserFile != "" {
		u, p, err := ReadUserFile(opts.UserFile)
		if err != nil {
			return nil, fmt.Errorf("bus: %w", err)
		}
		out = append(out, nats.UserInfo(u, p))
	}
	if opts.User != "" {
		out = append(out, nats.UserInfo(opts.User, opts.Password))
	}
	if opts.CredsFile != "" {
		if _, err := os.ReadFile(opts.CredsFile); err != nil {
			return nil, fmt.Errorf("bus: credentials file: %w", err)
		}
		out = append(out, nats.UserCredentials(opts.CredsFile))
	}
	if opts.NKeyFile != "" {
		o, err := nats.NkeyOptionFromSeed(opts.NKeyFile)
		if err != nil {
			return nil, fmt.Errorf("bus: NKey seed file %s: %w", opts.NKeyFile, err)
		}
		out = append(out, o)
	}
	if (opts.TLSCert == "") != (opts.TLSKey == "") {
		return nil, errors.New("bus: a TLS client certificate needs both the certificate and the key file")
	}
	if opts.TLSCA != "" {
		pem, err := os.ReadFile(opts.TLSCA)
		if err != nil {
			return nil, fmt.Errorf("bus: TLS CA file: %w", err)
		}
		if !x509.NewCertPool().AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("bus: TLS CA file %s: no PEM certificate in it", opts.TLSCA)
		}
		out = append(out, nats.RootCAs(opts.TLSCA))
	}
	if opts.TLSCert != "" {
		if _, err := tls.LoadX509KeyPair(opts.TLSCert, opts.TLSKey); err != nil {
			return nil, fmt.Errorf("bus: TLS client certificate: %w", err)
		}
		out = append(out, nats.ClientCert(opts.TLSCert, opts.TLSKey))
	}
	return out, nil
}

// busWarnEvery is the shortest interval between two logged bus errors; the
// ones in between are counted in the next line.
const busWarnEvery = 10 * time.Second

// newlyDropped returns how many messages sub dropped since the last call,
// and keeps watching it: the client reports a slow consumer once per
// episode, so the drops that follow are counted by recountDrops.
func (b *Bus) newlyDropped(sub *nats.Subscription) int {
	b.dropMu.Lock()
	defer b.dropMu.Unlock()
	total, err := sub.Dropped()
	if err != nil {
		delete(b.dropped, sub) // unsubscribed
		return 0
	}
	if b.dropped == nil {
		b.dropped = map[*nats.Subscription]int{}
	}
	n := total - b.dropped[sub]
	b.dropped[sub] = total
	return max(n, 0)
}

// recountDrops counts the drops of every subscription that was once slow.
func (b *Bus) recountDrops(m *Metrics) {
	if m == nil {
		return
	}
	b.dropMu.Lock()
	subs := make([]*nats.Subscription, 0, len(b.dropped))
	for s := range b.dropped {
		subs = append(subs, s)
	}
	b.dropMu.Unlock()
	for _, s := range subs {
		if n := b.newlyDropped(s); n > 0 {
			m.BusDropped(DropPendingLimit, n)
		}
	}
}

// Conn returns the NATS connection.
func (b *Bus) Conn() *nats.Conn { return b.nc }

// Up reports whether the bus may be published on now: connected, and the
// server answered within stallAfter.
func (b *Bus) Up() bool { return b.nc.IsConnected() && !b.stalled.Load() }

// probe watches a connected server's answers until the connection closes;
// see stallAfter.
func (b *Bus) probe(m *Metrics) {
	defer close(b.probeDone)
	t := time.NewTicker(probeEvery)
	defer t.Stop()
	last := time.Now()
	for {
		select {
		case <-b.closed:
			return
		case <-t.C:
		}
		b.recountDrops(m)
		if !b.nc.IsConnected() {
			last = time.Now() // the disconnect handlers report this
			b.stalled.Store(false)
			continue
		}
		err := b.nc.FlushTimeout(stallAfter)
		now := time.Now()
		if err == nil {
			last = now
			if b.stalled.Swap(false) {
				b.log.Info("bus: the server answers again")
				if m != nil {
					m.SetBusConnected(b.nc.IsConnected())
				}
			}
			continue
		}
		if now.Sub(last) >= stallAfter && b.nc.IsConnected() && !b.closing.Load() && !b.stalled.Swap(true) {
			b.log.Warn("bus: the server does not answer; estimates withheld until it does", "silent_for", now.Sub(last).Round(time.Millisecond), "error", err)
			if m != nil {
				m.SetBusConnected(false)
				m.BusDisconnected()
			}
		}
	}
}

// Close drains the connection — subscriptions stop taking messages, those
// already received are handled, pending publishes are flushed — and waits
// for the closed handler, at most timeout. A connection that cannot drain
// (it is reconnecting, say) is closed at once. Close may be called more than
// once; later calls wait for the same closure.
func (b *Bus) Close(timeout time.Duration) error {
	b.closing.Store(true)
	if err := b.nc.Drain(); err != nil && !errors.Is(err, nats.ErrConnectionClosed) {
		b.log.Info("bus cannot drain, closing", "error", err)
		b.nc.Close()
	}
	t := time.NewTimer(timeout)
	defer t.Stop()
	select {
	case <-b.closed:
		<-b.probeDone
		return nil
	case <-t.C:
		b.nc.Close()
		<-b.closed
		<-b.probeDone
		return fmt.Errorf("bus: not closed %v after draining began", timeout)
	}
}
