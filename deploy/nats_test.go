package deploy

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"fmt"
	"log/slog"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/nats-io/nats.go/micro"
	"github.com/nats-io/nkeys"

	"golang.org/x/crypto/bcrypt"
	"gopkg.in/yaml.v3"

	surmise "surmise/daemon"
	"surmise/daemon/lease"
)

// The NATS files name the paths of a real installation (/etc/nats/…, /var/lib/nats/…) and hold
// placeholder credentials. The tests copy them into a temporary directory, point the paths there,
// generate a throwaway CA with server and client certificates, and — where a test needs users
// that can log in — replace the placeholders with a fresh daemon nkey and bcrypt hashes of test
// passwords.

var natsFiles = []string{"nats-1.conf", "nats-2.conf", "nats-3.conf", "cluster.conf", "accounts.conf"}

// placeholderNkey is the daemon user's placeholder in accounts.conf: a valid public key whose
// seed was discarded.
const placeholderNkey = "UCODZMXZ7LEVWQELFBJNXIXOW22IBN23G4R56MGGVP3ZOKGBJY5D5FVV"

// placeholderHash is the placeholder bcrypt string of a password user in accounts.conf.
func placeholderHash(user string) string {
	return `"$2a$11$REPLACE.WITH.HASH.OF.` + strings.ToUpper(strings.ReplaceAll(user, "-", "_")) + `"`
}

// Test passwords of the users that log in with one; never used outside these tests.
var natsPasswords = map[string]string{
	"engineer":     "engineer-test-password",
	"gains-admin":  "gains-admin-test-password",
	"dashboard":    "dashboard-test-password",
	"plant-bridge": "bridge-test-password",
	"admin":        "admin-test-password",
}

// natsSetup is a prepared copy of deploy/nats.
type natsSetup struct {
	dir              string
	daemon           nkeys.KeyPair
	daemonPub        string
	ca, cert, key    string // the CA, and a client certificate for every test client
	stranger, strKey string // a client certificate from another CA
}

func (s *natsSetup) conf(name string) string { return filepath.Join(s.dir, name) }

// setupNATS copies the configs and makes certificates; with credentials, it also replaces the
// placeholder credentials with test ones (each placeholder must occur exactly once).
func setupNATS(t *testing.T, credentials bool) *natsSetup {
	t.Helper()
	s := &natsSetup{dir: t.TempDir()}
	kp, err := nkeys.CreateUser()
	if err != nil {
		t.Fatal(err)
	}
	s.daemon = kp
	if s.daemonPub, err = kp.PublicKey(); err != nil {
		t.Fatal(err)
	}
	for _, f := range natsFiles {
		text := string(readFile(t, filepath.Join("nats", f)))
		text = strings.ReplaceAll(text, "/etc/nats/", s.dir+"/")
		text = strings.ReplaceAll(text, "/var/lib/nats/", s.dir+"/state/")
		if f == "accounts.conf" && credentials {
			replace := map[string]string{placeholderNkey: s.daemonPub}
			for user, pw := range natsPasswords {
				// The lowest cost keeps the test fast; deployments use 11 or more.
				h, err := bcrypt.GenerateFromPassword([]byte(pw), bcrypt.MinCost)
				if err != nil {
					t.Fatal(err)
				}
				replace[placeholderHash(user)] = `"` + string(h) + `"`
			}
			for old, new := range replace {
				if n := strings.Count(text, old); n != 1 {
					t.Fatalf("accounts.conf: placeholder %s occurs %d times, want once", old, n)
				}
				text = strings.Replace(text, old, new, 1)
			}
		}
		if err := os.WriteFile(s.conf(f), []byte(text), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	tlsDir := filepath.Join(s.dir, "tls")
	if err := os.MkdirAll(tlsDir, 0o700); err != nil {
		t.Fatal(err)
	}
	ca, caKey := newCert(t, nil, nil, "surmise test CA", true)
	writePEM(t, filepath.Join(tlsDir, "ca.pem"), "CERTIFICATE", ca.Raw)
	srv, srvKey := newCert(t, ca, caKey, "nats-1.example.internal", false)
	writePEM(t, filepath.Join(tlsDir, "server.pem"), "CERTIFICATE", srv.Raw)
	writeKey(t, filepath.Join(tlsDir, "server-key.pem"), srvKey)
	cli, cliKey := newCert(t, ca, caKey, "surmise-daemon", false)
	s.ca, s.cert, s.key = filepath.Join(tlsDir, "ca.pem"), filepath.Join(s.dir, "client.pem"), filepath.Join(s.dir, "client-key.pem")
	writePEM(t, s.cert, "CERTIFICATE", cli.Raw)
	writeKey(t, s.key, cliKey)
	otherCA, otherKey := newCert(t, nil, nil, "someone else's CA", true)
	str, strKey := newCert(t, otherCA, otherKey, "stranger", false)
	s.stranger, s.strKey = filepath.Join(s.dir, "stranger.pem"), filepath.Join(s.dir, "stranger-key.pem")
	writePEM(t, s.stranger, "CERTIFICATE", str.Raw)
	writeKey(t, s.strKey, strKey)
	return s
}

// start runs a server from nats-1.conf alone on loopback: without its cluster routes, with a
// temporary JetStream store and no monitoring port; everything else as configured (mutual TLS,
// accounts, users, permissions). It returns the client URL.
func (s *natsSetup) start(t *testing.T) string {
	t.Helper()
	opts := &server.Options{}
	if err := opts.ProcessConfigFile(s.conf("nats-1.conf")); err != nil {
		t.Fatalf("nats-1.conf: %v", err)
	}
	opts.Host, opts.Port = "127.0.0.1", -1
	opts.HTTPHost, opts.HTTPPort = "", 0
	opts.Cluster, opts.Routes = server.ClusterOpts{}, nil
	opts.StoreDir = t.TempDir()
	opts.NoSigs, opts.NoLog = true, true
	srv, err := server.NewServer(opts)
	if err != nil {
		t.Fatalf("starting a server from nats-1.conf: %v", err)
	}
	srv.Start()
	t.Cleanup(func() { srv.Shutdown(); srv.WaitForShutdown() })
	if !srv.ReadyForConnections(10 * time.Second) {
		t.Fatal("the server did not become ready within 10 s")
	}
	return fmt.Sprintf("tls://127.0.0.1:%d", srv.Addr().(*net.TCPAddr).Port)
}

// newCert makes an ECDSA certificate: a self-signed CA when parent is nil, else a leaf for
// both server and client authentication, valid for loopback and the example host names.
func newCert(t *testing.T, parent *x509.Certificate, parentKey *ecdsa.PrivateKey, cn string, isCA bool) (*x509.Certificate, *ecdsa.PrivateKey) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	serial, err := rand.Int(rand.Reader, big.NewInt(1<<62))
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{
		SerialNumber: serial,
		Subject:      pkix.Name{CommonName: cn},
		NotBefore:    time.Now().Add(-time.Hour),
		NotAfter:     time.Now().Add(24 * time.Hour),
	}
	if isCA {
		tmpl.IsCA, tmpl.BasicConstraintsValid = true, true
		tmpl.KeyUsage = x509.KeyUsageCertSign | x509.KeyUsageDigitalSignature
		parent, parentKey = tmpl, key
	} else {
		tmpl.KeyUsage = x509.KeyUsageDigitalSignature
		tmpl.ExtKeyUsage = []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth, x509.ExtKeyUsageClientAuth}
		tmpl.DNSNames = []string{"localhost", "nats-1.example.internal", "nats-2.example.internal", "nats-3.example.internal"}
		tmpl.IPAddresses = []net.IP{net.IPv4(127, 0, 0, 1)}
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, parent, &key.PublicKey, parentKey)
	if err != nil {
		t.Fatal(err)
	}
	cert, err := x509.ParseCertificate(der)
	if err != nil {
		t.Fatal(err)
	}
	return cert, key
}

func writePEM(t *testing.T, path, typ string, der []byte) {
	t.Helper()
	if err := os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
}

func writeKey(t *testing.T, path string, key *ecdsa.PrivateKey) {
	t.Helper()
	der, err := x509.MarshalECPrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	writePEM(t, path, "EC PRIVATE KEY", der)
}

// TestNATSConfigs parses each node's configuration with the server's own parser, as
// `nats-server -t` does, and fails on warnings too (a plaintext password is one).
func TestNATSConfigs(t *testing.T) {
	s := setupNATS(t, true)
	names := map[string]bool{}
	for n := 1; n <= 3; n++ {
		path := s.conf(fmt.Sprintf("nats-%d.conf", n))
		opts := &server.Options{}
		if err := opts.ProcessConfigFile(path); err != nil {
			t.Fatalf("nats-%d.conf: %v", n, err)
		}
		if want := fmt.Sprintf("nats-%d", n); opts.ServerName != want {
			t.Errorf("nats-%d.conf: server_name %q, want %q", n, opts.ServerName, want)
		}
		names[opts.ServerName] = true
		if opts.Cluster.Name == "" || opts.Cluster.Port == 0 || len(opts.Routes) != 3 {
			t.Errorf("nats-%d.conf: cluster %q on port %d with %d routes, want a named cluster with 3 routes", n, opts.Cluster.Name, opts.Cluster.Port, len(opts.Routes))
		}
		if opts.Cluster.TLSConfig == nil {
			t.Errorf("nats-%d.conf: routes without TLS", n)
		}
		if !opts.JetStream || opts.JetStreamMaxMemory <= 0 || opts.JetStreamMaxStore <= 0 {
			t.Errorf("nats-%d.conf: JetStream %v with memory %d and store %d, want enabled with explicit limits", n, opts.JetStream, opts.JetStreamMaxMemory, opts.JetStreamMaxStore)
		}
		if opts.TLSConfig == nil || opts.TLSConfig.ClientAuth != tls.RequireAndVerifyClientCert {
			t.Errorf("nats-%d.conf: clients must use mutual TLS", n)
		}
		if opts.HTTPHost != "127.0.0.1" {
			t.Errorf("nats-%d.conf: monitoring on %q, want loopback only (it has no authentication)", n, opts.HTTPHost)
		}
		if opts.SystemAccount != "SYS" {
			t.Errorf("nats-%d.conf: system account %q, want SYS", n, opts.SystemAccount)
		}
		var users []string
		for _, u := range opts.Users {
			users = append(users, u.Username)
			if !strings.HasPrefix(u.Password, "$2a$") {
				t.Errorf("nats-%d.conf: user %s has a password that is not a bcrypt hash", n, u.Username)
			}
			if u.Username != "admin" && (u.Permissions == nil || u.Permissions.Publish == nil) {
				t.Errorf("nats-%d.conf: user %s may publish anything", n, u.Username)
			}
		}
		slices.Sort(users)
		if want := []string{"admin", "dashboard", "engineer", "gains-admin", "plant-bridge"}; !slices.Equal(users, want) {
			t.Errorf("nats-%d.conf: users %v, want %v", n, users, want)
		}
		if len(opts.Nkeys) != 1 || opts.Nkeys[0].Nkey != s.daemonPub {
			t.Errorf("nats-%d.conf: want the daemon's nkey user, and no other", n)
		} else if p := opts.Nkeys[0].Permissions; p == nil || p.Response == nil {
			t.Errorf("nats-%d.conf: the daemon must answer requests through allow_responses", n)
		}
		// The server's own validation of the options, short of starting it.
		srv, err := server.NewServer(opts)
		if err != nil {
			t.Fatalf("nats-%d.conf: the server refuses the options: %v", n, err)
		}
		srv.Shutdown()
	}
	if len(names) != 3 {
		t.Errorf("server names %v: JetStream needs three distinct names", names)
	}
}

// TestNATSPlaceholdersLockOut starts a server from the unedited accounts.conf: every user
// exists, and none can log in until its placeholder is replaced — not with an empty password,
// not with the placeholder's own text (it must be taken as a bcrypt hash, not a plaintext
// password), not with another nkey.
func TestNATSPlaceholdersLockOut(t *testing.T) {
	if !nkeys.IsValidPublicUserKey(placeholderNkey) {
		t.Fatalf("the placeholder nkey %s is not a valid user public key", placeholderNkey)
	}
	s := setupNATS(t, false)
	url := s.start(t)
	for user := range natsPasswords {
		for _, pw := range []string{"", strings.Trim(placeholderHash(user), `"`), natsPasswords[user], "password"} {
			if c, err := s.connect(t, url, nats.UserInfo(user, pw)); err == nil {
				c.Close()
				t.Errorf("%s logged in with password %q before its placeholder was replaced", user, pw)
			}
		}
	}
	if c, err := s.connect(t, url, nats.Nkey(s.daemonPub, s.daemon.Sign)); err == nil {
		c.Close()
		t.Error("a new daemon nkey logged in before the placeholder was replaced")
	}
}

// TestNATSServerConfigTest runs the real server binary's configuration test, when it is on
// PATH (CI installs it: go install github.com/nats-io/nats-server/v2@v2.15.2).
func TestNATSServerConfigTest(t *testing.T) {
	bin := requireTool(t, "nats-server", "go install github.com/nats-io/nats-server/v2@v2.15.2")
	for _, credentials := range []bool{false, true} {
		s := setupNATS(t, credentials)
		for n := 1; n <= 3; n++ {
			out, err := runTool(t, nil, bin, "-t", "-c", s.conf(fmt.Sprintf("nats-%d.conf", n)))
			if err != nil || !strings.Contains(out, "is valid") {
				t.Errorf("nats-server -t -c nats-%d.conf (placeholders replaced: %v): %v\n%s", n, credentials, err, out)
			}
		}
	}
	// And it catches a broken file: an nkey that is not one.
	s := setupNATS(t, false)
	text := string(readFile(t, s.conf("accounts.conf")))
	if err := os.WriteFile(s.conf("accounts.conf"), []byte(strings.Replace(text, placeholderNkey, "UNOTANKEY", 1)), 0o600); err != nil {
		t.Fatal(err)
	}
	if out, err := runTool(t, nil, bin, "-t", "-c", s.conf("nats-1.conf")); err == nil {
		t.Errorf("nats-server -t accepted an invalid nkey:\n%s", out)
	}
}

// plantSubjects reads the demo plant's wiring: the subjects of its inputs and outputs and its
// publish prefix.
func plantSubjects(t *testing.T) (name string, samples []string, publish string) {
	t.Helper()
	var p struct {
		Name    string                     `yaml:"name"`
		Inputs  []struct{ Subject string } `yaml:"inputs"`
		Outputs []struct{ Subject string } `yaml:"outputs"`
		Publish string                     `yaml:"publish"`
	}
	if err := yaml.Unmarshal(readFile(t, "../testdata/plants/hotwater-loop.yaml"), &p); err != nil {
		t.Fatal(err)
	}
	for _, s := range append(p.Inputs, p.Outputs...) {
		samples = append(samples, s.Subject)
	}
	if p.Name == "" || p.Publish == "" || len(samples) == 0 {
		t.Fatalf("testdata/plants/hotwater-loop.yaml: name %q, publish %q, %d subjects", p.Name, p.Publish, len(samples))
	}
	return p.Name, samples, p.Publish
}

// client is a test connection with the asynchronous errors the server sent it.
type client struct {
	*nats.Conn
	errs chan error
}

func (s *natsSetup) connect(t *testing.T, url string, opts ...nats.Option) (*client, error) {
	t.Helper()
	c := &client{errs: make(chan error, 64)}
	opts = append([]nats.Option{
		nats.RootCAs(s.ca),
		nats.ClientCert(s.cert, s.key),
		nats.Timeout(5 * time.Second),
		nats.NoReconnect(),
		nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) {
			select {
			case c.errs <- err:
			default:
			}
		}),
	}, opts...)
	nc, err := nats.Connect(url, opts...)
	if err != nil {
		return nil, err
	}
	c.Conn = nc
	t.Cleanup(nc.Close)
	return c, nil
}

// expectViolation waits until the server reports a permissions violation for op ("Publish" or
// "Subscription") on subject to this client.
func (c *client) expectViolation(t *testing.T, op, subject string) {
	t.Helper()
	want := strings.ToLower(fmt.Sprintf("Permissions Violation for %s to %q", op, subject))
	deadline := time.After(5 * time.Second)
	for {
		select {
		case err := <-c.errs:
			if strings.Contains(strings.ToLower(err.Error()), want) {
				return
			}
			t.Logf("another asynchronous error while waiting: %v", err)
		case <-deadline:
			t.Errorf("no permissions violation for %s to %q within 5 s: the user may do it", op, subject)
			return
		}
	}
}

// pending returns the asynchronous errors received so far, for failure messages.
func (c *client) pending() []error {
	var out []error
	for {
		select {
		case err := <-c.errs:
			out = append(out, err)
		default:
			return out
		}
	}
}

// noViolations fails the test for every permissions violation reported to the client so far,
// after a round trip to the server (errors for earlier operations have then arrived).
func (c *client) noViolations(t *testing.T, who string) {
	t.Helper()
	if err := c.Flush(); err != nil {
		t.Fatalf("%s: flush: %v", who, err)
	}
	for {
		select {
		case err := <-c.errs:
			t.Errorf("%s: unexpected asynchronous error: %v", who, err)
		default:
			return
		}
	}
}

// lockedBuffer is a bytes.Buffer safe for concurrent writers (a daemon's log).
type lockedBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *lockedBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *lockedBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

// TestNATSPermissions starts a server from nats-1.conf (see start) with test credentials and
// checks what each user may and may not do with the demo plant's subjects.
func TestNATSPermissions(t *testing.T) {
	s := setupNATS(t, true)
	url := s.start(t)

	name, samples, publish := plantSubjects(t)
	estimate, shadow := publish+".estimate", publish+".shadow.estimate"
	control := "surmise.control." + name + "."

	mustConnect := func(who string, o ...nats.Option) *client {
		c, err := s.connect(t, url, append(o, nats.Name(who))...)
		if err != nil {
			t.Fatalf("%s cannot connect: %v", who, err)
		}
		return c
	}
	pw := func(user string) nats.Option { return nats.UserInfo(user, natsPasswords[user]) }
	daemon := mustConnect("daemon", nats.Nkey(s.daemonPub, s.daemon.Sign))
	engineer := mustConnect("engineer", pw("engineer"))
	gainsAdmin := mustConnect("gains-admin", pw("gains-admin"))
	dashboard := mustConnect("dashboard", pw("dashboard"))
	bridge := mustConnect("plant-bridge", pw("plant-bridge"))

	t.Run("authentication", func(t *testing.T) {
		if _, err := s.connect(t, url, nats.UserInfo("engineer", "wrong")); err == nil {
			t.Error("engineer connected with a wrong password")
		}
		stranger, err := nkeys.CreateUser()
		if err != nil {
			t.Fatal(err)
		}
		pub, _ := stranger.PublicKey()
		if _, err := s.connect(t, url, nats.Nkey(pub, stranger.Sign)); err == nil {
			t.Error("an unknown nkey connected")
		}
		if _, err := s.connect(t, url, pw("engineer"), nats.ClientCert(s.stranger, s.strKey)); err == nil {
			t.Error("a client certificate from another CA was accepted")
		}
	})

	t.Run("samples reach the daemon, estimates reach the dashboard", func(t *testing.T) {
		var subs []*nats.Subscription
		for _, subj := range samples {
			sub, err := daemon.SubscribeSync(subj)
			if err != nil {
				t.Fatal(err)
			}
			subs = append(subs, sub)
		}
		daemon.noViolations(t, "daemon")
		for _, subj := range samples {
			if err := bridge.Publish(subj, []byte("61.2")); err != nil {
				t.Fatal(err)
			}
		}
		bridge.noViolations(t, "plant-bridge")
		for i, sub := range subs {
			if m, err := sub.NextMsg(5 * time.Second); err != nil || string(m.Data) != "61.2" {
				t.Errorf("daemon on %s: %v", samples[i], err)
			}
		}

		est, err := dashboard.SubscribeSync(estimate)
		if err != nil {
			t.Fatal(err)
		}
		sh, err := dashboard.SubscribeSync(shadow)
		if err != nil {
			t.Fatal(err)
		}
		dashboard.noViolations(t, "dashboard")
		for _, subj := range []string{estimate, shadow} {
			if err := daemon.Publish(subj, []byte(`{"status":"tracking"}`)); err != nil {
				t.Fatal(err)
			}
		}
		daemon.noViolations(t, "daemon")
		for _, sub := range []*nats.Subscription{est, sh} {
			if _, err := sub.NextMsg(5 * time.Second); err != nil {
				t.Errorf("dashboard on %s: %v", sub.Subject, err)
			}
		}
	})

	t.Run("the control service", func(t *testing.T) {
		svc, err := micro.AddService(daemon.Conn, micro.Config{Name: "surmise", Version: "0.1.0"})
		if err != nil {
			t.Fatalf("daemon: adding the micro service: %v", err)
		}
		t.Cleanup(func() { _ = svc.Stop() })
		group := svc.AddGroup("surmise.control." + name)
		verbs := []string{"status", "load", "promote", "rollback", "reset"}
		origins := make(chan surmise.Origin, len(verbs)+1)
		for _, v := range verbs {
			if err := group.AddEndpoint(v, micro.HandlerFunc(func(r micro.Request) {
				select {
				case origins <- surmise.RequestOrigin(r.Headers(), r.Reply()):
				default:
				}
				_ = r.Respond([]byte(v))
			})); err != nil {
				t.Fatal(err)
			}
		}
		daemon.noViolations(t, "daemon")
		for _, v := range verbs {
			// The engineer writes an identity of its own: the server replaces it on the
			// way through the import.
			req := &nats.Msg{Subject: control + v, Header: nats.Header{}}
			req.Header.Set(surmise.HeaderRequestInfo, `{"acc":"SURMISE","user":"someone-else"}`)
			m, err := engineer.RequestMsg(req, 5*time.Second)
			if err != nil || string(m.Data) != v {
				t.Errorf("engineer %s: %v", control+v, err)
				continue
			}
			if o := <-origins; !o.Verified || !strings.Contains(o.Who, "account=ENGINEERS user=engineer") || strings.Contains(o.Who, "someone-else") {
				t.Errorf("engineer %s: the daemon sees origin %+v, want the engineer, verified", v, o)
			}
		}
		// Within the daemons' account nobody may call a verb that changes anything.
		if err := gainsAdmin.Publish(control+"reset", nil); err != nil {
			t.Fatal(err)
		}
		gainsAdmin.expectViolation(t, "Publish", control+"reset")
		for _, who := range []*client{engineer, dashboard} {
			for _, subj := range []string{"$SRV.PING", "$SRV.INFO.surmise", "$SRV.STATS.surmise"} {
				if _, err := who.Request(subj, nil, 5*time.Second); err != nil {
					t.Errorf("%s %s: %v", who.Opts.Name, subj, err)
				}
			}
		}
		if m, err := dashboard.Request(control+"status", nil, 5*time.Second); err != nil || string(m.Data) != "status" {
			t.Errorf("dashboard status: %v", err)
		} else if o := <-origins; o.Verified {
			t.Errorf("a status request from the daemons' own account verified: %+v", o)
		}
		engineer.noViolations(t, "engineer")
		dashboard.noViolations(t, "dashboard")

		// Read-only users and the daemon itself cannot change an estimator.
		for _, v := range []string{"promote", "rollback", "reset", "load"} {
			if err := dashboard.Publish(control+v, nil); err != nil {
				t.Fatal(err)
			}
			dashboard.expectViolation(t, "Publish", control+v)
		}
		if err := daemon.Publish(control+"reset", nil); err != nil {
			t.Fatal(err)
		}
		daemon.expectViolation(t, "Publish", control+"reset")
	})

	t.Run("nobody but the bridge writes to the plant, nobody but the daemon writes estimates", func(t *testing.T) {
		for _, c := range []*client{daemon, engineer, dashboard} {
			if err := c.Publish(samples[0], []byte("0")); err != nil {
				t.Fatal(err)
			}
			c.expectViolation(t, "Publish", samples[0])
		}
		for _, c := range []*client{engineer, dashboard, bridge} {
			if err := c.Publish(estimate, []byte("{}")); err != nil {
				t.Fatal(err)
			}
			c.expectViolation(t, "Publish", estimate)
		}
		if _, err := bridge.SubscribeSync("pilot.>"); err != nil {
			t.Fatal(err)
		}
		bridge.expectViolation(t, "Subscription", "pilot.>")
	})

	t.Run("the daemons' leases", func(t *testing.T) {
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		defer cancel()
		m, err := lease.Open(ctx, daemon.Conn, lease.Config{Bucket: surmise.DefaultLeaseBucket})
		if err != nil {
			t.Fatalf("daemon: the lease bucket: %v (server errors: %v)", err, daemon.pending())
		}
		l, err := m.Acquire(ctx, name)
		if err != nil {
			t.Fatalf("daemon: taking a lease: %v (server errors: %v)", err, daemon.pending())
		}
		if err := l.Release(ctx); err != nil {
			t.Errorf("daemon: releasing a lease: %v", err)
		}
		if err := m.Close(ctx); err != nil {
			t.Error(err)
		}
		daemon.noViolations(t, "daemon")
	})

	t.Run("gains through the key-value bucket", func(t *testing.T) {
		ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
		defer cancel()
		ejs, err := jetstream.New(gainsAdmin.Conn)
		if err != nil {
			t.Fatal(err)
		}
		ekv, err := ejs.CreateKeyValue(ctx, jetstream.KeyValueConfig{Bucket: "surmise-gains", History: 10})
		if err != nil {
			t.Fatalf("gains-admin: creating the bucket: %v", err)
		}
		if _, err := ekv.Put(ctx, name, []byte("gains v1")); err != nil {
			t.Fatalf("gains-admin: put: %v", err)
		}

		djs, err := jetstream.New(daemon.Conn)
		if err != nil {
			t.Fatal(err)
		}
		// The daemon may declare the bucket itself at start (idempotently).
		dkv, err := djs.CreateOrUpdateKeyValue(ctx, jetstream.KeyValueConfig{Bucket: "surmise-gains", History: 10})
		if err != nil {
			t.Fatalf("daemon: binding the bucket: %v (server errors: %v)", err, daemon.pending())
		}
		if e, err := dkv.Get(ctx, name); err != nil || string(e.Value()) != "gains v1" {
			t.Fatalf("daemon: get %s: %v", name, err)
		}
		w, err := dkv.Watch(ctx, name)
		if err != nil {
			t.Fatalf("daemon: watch: %v", err)
		}
		defer func() { _ = w.Stop() }()
		next := func() jetstream.KeyValueEntry {
			select {
			case e := <-w.Updates():
				return e
			case <-ctx.Done():
				t.Fatal("daemon: no update from the watcher in time")
				return nil
			}
		}
		if e := next(); e == nil || string(e.Value()) != "gains v1" {
			t.Fatalf("daemon: the watcher's initial value is not gains v1: %v", e)
		}
		if e := next(); e != nil {
			t.Fatalf("daemon: want the end-of-initial-values marker, got %q", e.Value())
		}
		if _, err := ekv.Put(ctx, name, []byte("gains v2")); err != nil {
			t.Fatal(err)
		}
		if e := next(); e == nil || string(e.Value()) != "gains v2" {
			t.Fatalf("daemon: the watcher did not deliver gains v2")
		}
		// `load` on one daemon distributes to the fleet.
		if _, err := dkv.Put(ctx, name, []byte("gains v3")); err != nil {
			t.Fatalf("daemon: put: %v", err)
		}
		if e, err := ekv.Get(ctx, name); err != nil || string(e.Value()) != "gains v3" {
			t.Errorf("gains-admin: get after the daemon's put: %v", err)
		}
		daemon.noViolations(t, "daemon")
		gainsAdmin.noViolations(t, "gains-admin")

		for _, subj := range []string{"$KV.surmise-gains." + name, "$JS.API.STREAM.INFO.KV_surmise-gains"} {
			if err := dashboard.Publish(subj, []byte("x")); err != nil {
				t.Fatal(err)
			}
			dashboard.expectViolation(t, "Publish", subj)
		}
	})

	t.Run("a fleet: the gains admin puts a plant, a fleet daemon runs it", func(t *testing.T) {
		ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
		defer cancel()
		store, err := surmise.OpenFleet(ctx, gainsAdmin.Conn, "site", 0, 0)
		if err != nil {
			t.Fatalf("gains-admin: opening the fleet: %v (server errors: %v)", err, gainsAdmin.pending())
		}
		// The hand-written cart, wired to the kit's plant subjects (pilot.>).
		plant := bytes.ReplaceAll(readFile(t, filepath.Join("..", "testdata", "config", "double-integrator.yaml")), []byte("bench.cart."), []byte("pilot.cart."))
		gains := readFile(t, filepath.Join("..", "testdata", "config", "double-integrator.gains.yaml"))
		if _, _, err := store.Put(ctx, "double-integrator", plant, gains); err != nil {
			t.Fatalf("gains-admin: put: %v", err)
		}
		var log lockedBuffer
		seed, err := s.daemon.Seed()
		if err != nil {
			t.Fatal(err)
		}
		seedFile := filepath.Join(t.TempDir(), "nats.nk")
		if err := os.WriteFile(seedFile, seed, 0o600); err != nil {
			t.Fatal(err)
		}
		d, err := surmise.New(surmise.Options{
			Bus:   surmise.BusOptions{URL: url, NKeyFile: seedFile, TLSCA: s.ca, TLSCert: s.cert, TLSKey: s.key},
			Fleet: &surmise.FleetOptions{Name: "site", CheckpointEvery: 200 * time.Millisecond}, Instance: "pod-1",
			Listen: "127.0.0.1:0", Notify: func(string) error { return nil },
			Logger: slog.New(slog.NewTextHandler(&log, nil)),
		})
		if err != nil {
			t.Fatal(err)
		}
		dctx, stop := context.WithCancel(context.Background())
		done := make(chan error, 1)
		go func() { done <- d.Run(dctx) }()
		defer func() {
			stop()
			if err := <-done; err != nil {
				t.Errorf("fleet daemon: %v", err)
			}
		}()
		// The daemon owns the estimator (a lease) and checkpoints it: it read the files,
		// took the lease and wrote the state bucket with the kit's permissions.
		deadline := time.Now().Add(15 * time.Second)
		for {
			o, held, err1 := store.Owner(ctx, "double-integrator")
			cp, err2 := store.Checkpoint(ctx, "double-integrator")
			if held && o.Instance == "pod-1" && cp != nil && cp.Instance == "pod-1" {
				break
			}
			if time.Now().After(deadline) {
				t.Fatalf("no owner and checkpoint after 15 s: owner %+v held %v (%v), checkpoint %+v (%v)", o, held, err1, cp, err2)
			}
			time.Sleep(50 * time.Millisecond) // polling the bucket
		}
		if _, err := store.History(ctx, "double-integrator"); err != nil {
			t.Errorf("gains-admin: history: %v", err)
		}
		if names, err := store.Names(ctx); err != nil || !slices.Equal(names, []string{"double-integrator"}) {
			t.Errorf("gains-admin: names %v, %v", names, err)
		}
		gainsAdmin.noViolations(t, "gains-admin")
		stop()
		if err := <-done; err != nil {
			t.Errorf("fleet daemon: %v", err)
		}
		done <- nil // for the deferred stop
		if strings.Contains(log.String(), "ermission") {
			t.Errorf("the fleet daemon met permission errors:\n%s", log.String())
		}
		dctx2, cancel2 := context.WithTimeout(ctx, 2*time.Second)
		defer cancel2()
		if _, err := surmise.OpenFleet(dctx2, dashboard.Conn, "site", 0, 0); err == nil {
			t.Error("the dashboard opened the fleet's buckets")
		}
	})

	t.Run("recordings", func(t *testing.T) {
		ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
		defer cancel()
		djs, err := jetstream.New(daemon.Conn)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := djs.CreateOrUpdateStream(ctx, jetstream.StreamConfig{Name: "SURMISE_RECORDINGS", Subjects: samples}); err != nil {
			t.Fatalf("daemon: declaring the recordings stream: %v", err)
		}
		for i, subj := range samples {
			if err := bridge.Publish(subj, []byte(fmt.Sprint(60+i))); err != nil {
				t.Fatal(err)
			}
		}
		bridge.noViolations(t, "plant-bridge")
		ejs, err := jetstream.New(gainsAdmin.Conn)
		if err != nil {
			t.Fatal(err)
		}
		cons, err := ejs.OrderedConsumer(ctx, "SURMISE_RECORDINGS", jetstream.OrderedConsumerConfig{})
		if err != nil {
			t.Fatalf("gains-admin: replaying the recordings: %v", err)
		}
		for i, subj := range samples {
			m, err := cons.Next(jetstream.FetchMaxWait(5 * time.Second))
			if err != nil {
				t.Fatalf("gains-admin: recording %d: %v (server errors: %v)", i, err, gainsAdmin.pending())
			}
			if m.Subject() != subj || string(m.Data()) != fmt.Sprint(60+i) {
				t.Errorf("gains-admin: recording %d is %s %q, want %s %q", i, m.Subject(), m.Data(), subj, fmt.Sprint(60+i))
			}
		}
		daemon.noViolations(t, "daemon")
		gainsAdmin.noViolations(t, "gains-admin")
	})
}
