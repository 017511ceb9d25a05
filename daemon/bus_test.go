package daemon

import (
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"errors"
	"fmt"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nkeys"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/testutil"
)

// checkFor polls f every interval until it returns nil, and fails the test
// with f's last error if that has not happened within total.
func checkFor(t *testing.T, total, every time.Duration, f func() error) {
	t.Helper()
	deadline := time.Now().Add(total)
	var err error
	for {
		if err = f(); err == nil {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("after %v: %v", total, err)
		}
		time.Sleep(every)
	}
}

func startTestServer(t *testing.T, port int, dir string) *server.Server {
	t.Helper()
	ns, err := StartEmbedded(EmbeddedOptions{Port: port, StoreDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		ns.Shutdown()
		ns.WaitForShutdown()
	})
	return ns
}

// roundTrip publishes payload on subject and waits for it on sub.
func roundTrip(t *testing.T, nc *nats.Conn, sub *nats.Subscription, payload string) {
	t.Helper()
	if err := nc.Publish(sub.Subject, []byte(payload)); err != nil {
		t.Fatalf("publish: %v", err)
	}
	msg, err := sub.NextMsg(5 * time.Second)
	if err != nil {
		t.Fatalf("receive: %v", err)
	}
	if string(msg.Data) != payload {
		t.Fatalf("received %q, want %q", msg.Data, payload)
	}
}

func TestEmbeddedRoundTrip(t *testing.T) {
	dir := t.TempDir()
	ns := startTestServer(t, -1, dir)

	// Limits are ours, not the server's defaults (75 % of memory and disk).
	js := ns.JetStreamConfig()
	if js == nil {
		t.Fatal("JetStream is not enabled")
	}
	if js.MaxMemory != 64<<20 || js.MaxStore != 1<<30 || !strings.HasPrefix(js.StoreDir, dir) {
		t.Errorf("JetStream config = %+v, want 64 MiB memory, 1 GiB store in %s", js, dir)
	}
	if host, _, _ := net.SplitHostPort(ns.Addr().String()); host != "127.0.0.1" {
		t.Errorf("server listens on %s, want 127.0.0.1 only", ns.Addr())
	}

	m := NewMetrics(prometheus.NewPedanticRegistry())
	bus, err := Connect(BusOptions{Embedded: ns}, m, nil)
	if err != nil {
		t.Fatal(err)
	}
	if v := testutil.ToFloat64(m.busConnected); v != 1 {
		t.Errorf("surmise_bus_connected = %v after Connect, want 1", v)
	}
	sub, err := bus.Conn().SubscribeSync("plant.loop.t_tank")
	if err != nil {
		t.Fatal(err)
	}
	roundTrip(t, bus.Conn(), sub, "61.2")

	if err := bus.Close(5 * time.Second); err != nil {
		t.Fatal(err)
	}
	if !bus.Conn().IsClosed() {
		t.Error("connection not closed after Close")
	}
	if v := testutil.ToFloat64(m.busConnected); v != 0 {
		t.Errorf("surmise_bus_connected = %v after Close, want 0", v)
	}
	if v := testutil.ToFloat64(m.busDisconnects); v != 0 {
		t.Errorf("surmise_bus_disconnects_total = %v after our own Close, want 0", v)
	}
	if err := bus.Close(time.Second); err != nil { // again: already closed
		t.Errorf("second Close = %v", err)
	}
}

func TestBusReconnectsAfterServerRestart(t *testing.T) {
	dir := t.TempDir()
	ns := startTestServer(t, -1, dir)
	port := ns.Addr().(*net.TCPAddr).Port

	m := NewMetrics(prometheus.NewPedanticRegistry())
	bus, err := Connect(BusOptions{
		URL:             ns.ClientURL(),
		ReconnectWait:   20 * time.Millisecond,
		ReconnectJitter: 5 * time.Millisecond,
	}, m, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer bus.Close(5 * time.Second)
	nc := bus.Conn()
	sub, err := nc.SubscribeSync("plant.loop.t_hx")
	if err != nil {
		t.Fatal(err)
	}
	roundTrip(t, nc, sub, "40.5")

	ns.Shutdown()
	ns.WaitForShutdown()
	checkFor(t, 5*time.Second, 10*time.Millisecond, func() error {
		if d, c := testutil.ToFloat64(m.busDisconnects), testutil.ToFloat64(m.busConnected); d != 1 || c != 0 {
			return fmt.Errorf("disconnects_total %v, connected %v; want 1 and 0", d, c)
		}
		return nil
	})
	// No reconnect buffer: a publish during the outage fails at once
	// instead of being replayed later.
	if err := nc.Publish("surmise.loop.estimate", []byte("{}")); !errors.Is(err, nats.ErrReconnectBufExceeded) {
		t.Errorf("publish while disconnected = %v, want %v", err, nats.ErrReconnectBufExceeded)
	}

	startTestServer(t, port, dir) // the same port
	checkFor(t, 10*time.Second, 10*time.Millisecond, func() error {
		if c := testutil.ToFloat64(m.busConnected); c != 1 {
			return fmt.Errorf("connected %v, want 1", c)
		}
		return nil
	})
	roundTrip(t, nc, sub, "40.6") // the subscription came back with the connection
	if d := testutil.ToFloat64(m.busDisconnects); d != 1 {
		t.Errorf("disconnects_total = %v, want 1", d)
	}
}

func TestStartEmbeddedDefaultPort(t *testing.T) {
	addr := fmt.Sprintf("127.0.0.1:%d", DefaultEmbeddedPort)
	t.Run("taken", func(t *testing.T) {
		// Hold the default port (or find it held by someone else): the
		// server falls back to a random port.
		if ln, err := net.Listen("tcp", addr); err == nil {
			defer ln.Close()
		}
		ns := startTestServer(t, 0, t.TempDir())
		if p := ns.Addr().(*net.TCPAddr).Port; p == DefaultEmbeddedPort || p == 0 {
			t.Errorf("server on port %d with the default port taken", p)
		}
	})
	t.Run("free", func(t *testing.T) {
		ln, err := net.Listen("tcp", addr)
		if err != nil {
			t.Skipf("port %d is in use on this machine", DefaultEmbeddedPort)
		}
		ln.Close()
		ns := startTestServer(t, 0, t.TempDir())
		if p := ns.Addr().(*net.TCPAddr).Port; p != DefaultEmbeddedPort {
			t.Errorf("server on port %d, want the default %d while it is free", p, DefaultEmbeddedPort)
		}
	})
}

func TestStartEmbeddedErrors(t *testing.T) {
	for _, tc := range []struct {
		name string
		opts EmbeddedOptions
		want string
	}{
		{"no store", EmbeddedOptions{Port: -1}, "store directory"},
		{"bad port", EmbeddedOptions{Port: 70000, StoreDir: t.TempDir()}, "out of range"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ns, err := StartEmbedded(tc.opts)
			if err == nil {
				ns.Shutdown()
				t.Fatal("StartEmbedded succeeded")
			}
			if !strings.Contains(err.Error(), tc.want) {
				t.Errorf("error %q does not mention %q", err, tc.want)
			}
		})
	}
}

func TestConnectOptionErrors(t *testing.T) {
	dir := t.TempDir()
	notPEM := filepath.Join(dir, "ca.txt")
	if err := os.WriteFile(notPEM, []byte("not a certificate"), 0o600); err != nil {
		t.Fatal(err)
	}
	missing := filepath.Join(dir, "missing")
	url := "nats://127.0.0.1:1"
	for _, tc := range []struct {
		name string
		opts BusOptions
		want string
	}{
		{"no server", BusOptions{}, "no server URL"},
		{"creds and nkey", BusOptions{URL: url, CredsFile: notPEM, NKeyFile: notPEM}, "use one"},
		{"missing creds", BusOptions{URL: url, CredsFile: missing}, "credentials file"},
		{"bad nkey", BusOptions{URL: url, NKeyFile: notPEM}, "NKey seed file"},
		{"cert without key", BusOptions{URL: url, TLSCert: notPEM}, "both the certificate and the key"},
		{"missing CA", BusOptions{URL: url, TLSCA: missing}, "TLS CA file"},
		{"CA not PEM", BusOptions{URL: url, TLSCA: notPEM}, "no PEM certificate"},
		{"bad client cert", BusOptions{URL: url, TLSCert: notPEM, TLSKey: notPEM}, "TLS client certificate"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			bus, err := Connect(tc.opts, nil, nil)
			if err == nil {
				bus.Close(time.Second)
				t.Fatal("Connect succeeded")
			}
			if !strings.Contains(err.Error(), tc.want) {
				t.Errorf("error %q does not mention %q", err, tc.want)
			}
		})
	}
}

func TestConnectNKey(t *testing.T) {
	user, err := nkeys.CreateUser()
	if err != nil {
		t.Fatal(err)
	}
	pub, _ := user.PublicKey()
	seed, _ := user.Seed()
	seedFile := filepath.Join(t.TempDir(), "user.nk")
	if err := os.WriteFile(seedFile, seed, 0o600); err != nil {
		t.Fatal(err)
	}
	ns := runServer(t, &server.Options{Nkeys: []*server.NkeyUser{{Nkey: pub}}})

	bus, err := Connect(BusOptions{URL: ns.ClientURL(), NKeyFile: seedFile}, nil, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer bus.Close(5 * time.Second)
	if !bus.Conn().IsConnected() {
		t.Fatalf("not connected with the NKey: %v", bus.Conn().LastError())
	}
	sub, err := bus.Conn().SubscribeSync("plant.x")
	if err != nil {
		t.Fatal(err)
	}
	roundTrip(t, bus.Conn(), sub, "1")
}

func TestConnectTLS(t *testing.T) {
	dir := t.TempDir()
	files := writeTestPKI(t, dir)
	tlsConfig, err := server.GenTLSConfig(&server.TLSConfigOpts{
		CertFile: files["server.pem"], KeyFile: files["server-key.pem"], CaFile: files["ca.pem"], Verify: true,
	})
	if err != nil {
		t.Fatal(err)
	}
	ns := runServer(t, &server.Options{TLSConfig: tlsConfig, TLS: true, TLSVerify: true, TLSTimeout: 2})

	bus, err := Connect(BusOptions{
		URL:   ns.ClientURL(),
		TLSCA: files["ca.pem"], TLSCert: files["client.pem"], TLSKey: files["client-key.pem"],
	}, nil, nil)
	if err != nil {
		t.Fatal(err)
	}
	defer bus.Close(5 * time.Second)
	if !bus.Conn().IsConnected() {
		t.Fatalf("not connected over TLS: %v", bus.Conn().LastError())
	}
	if _, err := bus.Conn().TLSConnectionState(); err != nil {
		t.Errorf("connection is not TLS: %v", err)
	}
	sub, err := bus.Conn().SubscribeSync("plant.x")
	if err != nil {
		t.Fatal(err)
	}
	roundTrip(t, bus.Conn(), sub, "2")
}

// runServer runs a NATS server with the given options on a random loopback
// port, for tests of authentication that StartEmbedded does not configure.
func runServer(t *testing.T, opts *server.Options) *server.Server {
	t.Helper()
	opts.Host, opts.Port, opts.NoSigs, opts.NoLog = "127.0.0.1", -1, true, true
	ns, err := server.NewServer(opts)
	if err != nil {
		t.Fatal(err)
	}
	ns.Start()
	t.Cleanup(func() {
		ns.Shutdown()
		ns.WaitForShutdown()
	})
	if !ns.ReadyForConnections(5 * time.Second) {
		t.Fatal("server not ready")
	}
	return ns
}

// writeTestPKI writes a certificate authority, a server certificate for
// 127.0.0.1 and a client certificate, all signed by it, as PEM files.
func writeTestPKI(t *testing.T, dir string) map[string]string {
	t.Helper()
	files := map[string]string{}
	write := func(name, typ string, der []byte) {
		path := filepath.Join(dir, name)
		if err := os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
			t.Fatal(err)
		}
		files[name] = path
	}
	newKey := func(name string) *ecdsa.PrivateKey {
		k, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		if err != nil {
			t.Fatal(err)
		}
		der, err := x509.MarshalPKCS8PrivateKey(k)
		if err != nil {
			t.Fatal(err)
		}
		write(name, "PRIVATE KEY", der)
		return k
	}
	now := time.Now()
	caKey := newKey("ca-key.pem")
	caTmpl := &x509.Certificate{
		SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "surmise test CA"},
		NotBefore: now.Add(-time.Hour), NotAfter: now.Add(time.Hour),
		IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign,
	}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	write("ca.pem", "CERTIFICATE", caDER)
	ca, _ := x509.ParseCertificate(caDER)
	for i, leaf := range []struct {
		name  string
		usage x509.ExtKeyUsage
	}{{"server", x509.ExtKeyUsageServerAuth}, {"client", x509.ExtKeyUsageClientAuth}} {
		k := newKey(leaf.name + "-key.pem")
		tmpl := &x509.Certificate{
			SerialNumber: big.NewInt(int64(i + 2)), Subject: pkix.Name{CommonName: leaf.name},
			NotBefore: now.Add(-time.Hour), NotAfter: now.Add(time.Hour),
			KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{leaf.usage},
			IPAddresses: []net.IP{net.ParseIP("127.0.0.1")},
		}
		der, err := x509.CreateCertificate(rand.Reader, tmpl, ca, &k.PublicKey, caKey)
		if err != nil {
			t.Fatal(err)
		}
		write(leaf.name+".pem", "CERTIFICATE", der)
	}
	return files
}

func ExampleConnect() {
	dir, err := os.MkdirTemp("", "surmise-example")
	if err != nil {
		fmt.Println(err)
		return
	}
	defer os.RemoveAll(dir)
	ns, err := StartEmbedded(EmbeddedOptions{Port: -1, StoreDir: dir})
	if err != nil {
		fmt.Println(err)
		return
	}
	defer ns.WaitForShutdown()
	defer ns.Shutdown()
	bus, err := Connect(BusOptions{Embedded: ns, Name: "surmise-example"}, nil, nil)
	if err != nil {
		fmt.Println(err)
		return
	}
	defer bus.Close(5 * time.Second)
	fmt.Println(bus.Conn().IsConnected())
	// Output: true
}
