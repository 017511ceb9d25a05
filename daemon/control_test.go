package daemon

import (
	"encoding/json"
	"errors"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"
)

// ctlRig is a cart rig whose commissioner answers on a real NATS server
// (in-process, random loopback port).
type ctlRig struct {
	*cmRig
	nc  *nats.Conn
	idx *ControlIndex
}

func newCtlRig(t *testing.T) *ctlRig {
	r := &ctlRig{cmRig: newCMRig(t, cmRigOptions{active: "slow", candidate: "kalman", dwell: -1})}
	ns, err := StartEmbedded(EmbeddedOptions{Port: -1, StoreDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { ns.Shutdown(); ns.WaitForShutdown() })
	svcConn, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(svcConn.Close)
	r.idx = NewControlIndex()
	r.idx.Add(r.c)
	svc, err := StartControlIndex(svcConn, r.idx)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { svc.Stop() })
	// A round trip, so the server has the service's subscriptions before
	// the first request (as the daemon does after starting the service).
	if err := svcConn.Flush(); err != nil {
		t.Fatal(err)
	}
	r.nc, err = nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(r.nc.Close)
	return r
}

// request sends a control request and returns the reply's error code ("" for
// none) and body.
func (r *ctlRig) request(t *testing.T, verb string, body []byte, hdr map[string]string) (code string, data []byte) {
	t.Helper()
	msg := &nats.Msg{Subject: ControlSubject("cart", verb), Data: body, Header: nats.Header{}}
	for k, v := range hdr {
		msg.Header.Set(k, v)
	}
	reply, err := r.nc.RequestMsg(msg, 10*time.Second)
	if err != nil {
		t.Fatalf("%s: %v", verb, err)
	}
	return reply.Header.Get(micro.ErrorCodeHeader), reply.Data
}

// TestControlService runs every verb over the bus, the accepted requests and
// the refused ones with their codes.
func TestControlService(t *testing.T) {
	r := newCtlRig(t)
	r.tick()
	fp := "sha256:" + strings.Repeat("0", 64)
	steps := []struct {
		name, verb string
		body       string
		hdr        map[string]string
		code       string // "" accepted
		want       string // in the reply body
	}{
		{"status", VerbStatus, "", nil, "", `"active":{"name":"slow","form":"prediction"`},
		{"status shows the candidate", VerbStatus, "", nil, "", `"candidate":{"name":"kalman","form":"kalman"`},
		{"load nothing", VerbLoad, " \n", nil, CodeBadRequest, "the request body must be a gains file"},
		{"load an invalid file", VerbLoad, string(cmBadGains(fp, "0.5", "0.1", "0.02")), nil, CodeInvalid, `control request:1:14: fingerprint:`},
		{"load, another active set", VerbLoad, string(cmGains(t, r.plant, "slow", "kalman", "slow", "fast", "kalman")),
			map[string]string{HeaderSet: "fast"}, "", `"note":"active set slow → fast, state carried over; candidate kalman keeps running"`},
		{"load, no candidate", VerbLoad, string(cmGains(t, r.plant, "fast", "kalman", "slow", "fast", "kalman")),
			map[string]string{HeaderCandidate: NoCandidate}, "", `shadow stopped`},
		{"promote with no candidate", VerbPromote, "", nil, CodeRefused, "nothing to promote"},
		{"promote, transfer not a string", VerbPromote, `{"transfer": 3}`, nil, CodeBadRequest, "request body"},
		{"promote, unknown field", VerbPromote, `{"confirm": true, "force": true}`, nil, CodeBadRequest, `unknown field \"force\"`},
		{"promote, two values", VerbPromote, `{} {}`, nil, CodeBadRequest, "more than one JSON value"},
		{"rollback", VerbRollback, `{}`, map[string]string{HeaderOperator: "ann@bench"}, "", `"active":{"name":"slow"`},
		{"reset, unknown state", VerbReset, `{"state": {"nope": 1}}`, nil, CodeBadRequest, `state \"nope\": no such state`},
		{"reset", VerbReset, `{"state": {"position": 2}, "std": {"position": 0.1, "velocity": 0.1}, "confirm": true}`, nil, "", `"applied":true,"state":{"position":2,"velocity":0}`},
	}
	for _, s := range steps {
		code, data := r.request(t, s.verb, []byte(s.body), s.hdr)
		if code != s.code || !strings.Contains(string(data), s.want) {
			t.Errorf("%s: code %q, reply %s; want code %q and %s", s.name, code, data, s.code, s.want)
		}
		if code != "" {
			var ce ControlError
			if err := json.Unmarshal(data, &ce); err != nil || ce.Code != code || ce.Error == "" {
				t.Errorf("%s: error body %s is not a ControlError with code %s", s.name, data, code)
			}
		}
	}
	// Who asked: the reply subject the bus carried, and the claim.
	var rollback *AuditEntry
	for _, a := range r.audit.Tail("cart", 10) {
		if a.Action == "rollback" {
			rollback = &a
		}
	}
	if rollback == nil || !strings.HasPrefix(rollback.Origin, "reply-subject: _INBOX.") || rollback.ClaimedBy != "ann@bench" {
		t.Errorf("rollback audit %+v", rollback)
	}
}

// TestControlDiscovery asks $SRV.INFO for the service: one endpoint per
// verb, on surmise.control.*.<verb> whatever the number of estimators, no
// queue group.
func TestControlDiscovery(t *testing.T) {
	r := newCtlRig(t)
	reply, err := r.nc.Request("$SRV.INFO."+ControlService, nil, 10*time.Second)
	if err != nil {
		t.Fatal(err)
	}
	var info micro.Info
	if err := json.Unmarshal(reply.Data, &info); err != nil {
		t.Fatal(err)
	}
	var subjects []string
	for _, ep := range info.Endpoints {
		subjects = append(subjects, ep.Subject)
		if ep.QueueGroup != "" {
			t.Errorf("endpoint %+v has a queue group", ep)
		}
	}
	slices.Sort(subjects)
	want := []string{"surmise.control.*.load", "surmise.control.*.promote", "surmise.control.*.reset",
		"surmise.control.*.rollback", "surmise.control.*.status"}
	if !slices.Equal(subjects, want) || info.Name != ControlService || info.Version != ControlVersion {
		t.Errorf("info %s: subjects %v", reply.Data, subjects)
	}
}

// TestControlIndexRoutes checks that a request is routed by the estimator
// in its subject: the one in the index answers, one that is not gets no
// reply from this daemon (another daemon on the bus may run it), and one
// added while the service runs answers from then on, one removed stops.
func TestControlIndexRoutes(t *testing.T) {
	r := newCtlRig(t)
	ask := func(name string) error {
		_, err := r.nc.Request(ControlSubject(name, VerbStatus), nil, 300*time.Millisecond)
		return err
	}
	if err := ask("cart"); err != nil {
		t.Fatalf("status of cart: %v", err)
	}
	if err := ask("other"); !errors.Is(err, nats.ErrTimeout) {
		t.Errorf("status of an estimator not in the index: %v, want a timeout (no reply)", err)
	}
	r.idx.Remove("cart")
	if err := ask("cart"); !errors.Is(err, nats.ErrTimeout) {
		t.Errorf("status of a removed estimator: %v, want a timeout (no reply)", err)
	}
	r.idx.Add(r.c)
	if err := ask("cart"); err != nil {
		t.Errorf("status of cart added again: %v", err)
	}
	if got := r.idx.Names(); !slices.Equal(got, []string{"cart"}) {
		t.Errorf("names %v", got)
	}
}

// TestRequestOriginImport sends a request from another account through a
// service import that shares the requester's identity: the server adds
// Nats-Request-Info, and the origin recorded is that identity, not a reply
// subject a client could pick.
func TestRequestOriginImport(t *testing.T) {
	dir := t.TempDir()
	conf := filepath.Join(dir, "accounts.conf")
	if err := os.WriteFile(conf, []byte(`
listen: 127.0.0.1:-1
accounts {
  PLANT { users: [{user: daemon, password: d}, {user: mallory, password: m}], exports: [{service: "surmise.control.>"}] }
  ENG { users: [{user: ann, password: a}], imports: [{service: {account: PLANT, subject: "surmise.control.>"}, share: true}] }
}
`), 0o644); err != nil {
		t.Fatal(err)
	}
	opts, err := server.ProcessConfigFile(conf)
	if err != nil {
		t.Fatal(err)
	}
	opts.NoSigs, opts.NoLog = true, true
	ns, err := server.NewServer(opts)
	if err != nil {
		t.Fatal(err)
	}
	go ns.Start()
	t.Cleanup(func() { ns.Shutdown(); ns.WaitForShutdown() })
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("server not ready")
	}
	got := make(chan Origin, 1)
	svcConn, err := nats.Connect(ns.ClientURL(), nats.UserInfo("daemon", "d"))
	if err != nil {
		t.Fatal(err)
	}
	defer svcConn.Close()
	svc, err := micro.AddService(svcConn, micro.Config{Name: "probe", Version: "1.0.0",
		Endpoint: &micro.EndpointConfig{Subject: ControlSubject("cart", VerbStatus), Handler: micro.HandlerFunc(func(req micro.Request) {
			got <- origin(req)
			req.Respond([]byte("{}"))
		})}})
	if err != nil {
		t.Fatal(err)
	}
	defer svc.Stop()
	ann, err := nats.Connect(ns.ClientURL(), nats.UserInfo("ann", "a"), nats.Name("surmise ctl"))
	if err != nil {
		t.Fatal(err)
	}
	defer ann.Close()
	if _, err := ann.Request(ControlSubject("cart", VerbStatus), nil, 10*time.Second); err != nil {
		t.Fatal(err)
	}
	o := <-got
	for _, w := range []string{"request-info: ", "account=ENG", "user=ann", "client=surmise ctl", "host=127.0.0.1", "cid="} {
		if !strings.Contains(o.Who, w) {
			t.Errorf("origin %q lacks %q", o.Who, w)
		}
	}
	if !o.Verified {
		t.Errorf("origin %q through the import not verified", o.Who)
	}

	// Ann writes the header herself, naming someone else: the server
	// replaces it on the way through the import.
	forged := &nats.Msg{Subject: ControlSubject("cart", VerbStatus), Header: nats.Header{}}
	forged.Header.Set(HeaderRequestInfo, `{"acc":"ENG","user":"someone-else"}`)
	if _, err := ann.RequestMsg(forged, 10*time.Second); err != nil {
		t.Fatal(err)
	}
	if o := <-got; !o.Verified || !strings.Contains(o.Who, "user=ann") || strings.Contains(o.Who, "someone-else") {
		t.Errorf("a header forged through the import gave origin %+v, want ann, verified", o)
	}

	// A client of the daemon's own account writes it: a claim, not an
	// identity.
	mallory, err := nats.Connect(ns.ClientURL(), nats.UserInfo("mallory", "m"))
	if err != nil {
		t.Fatal(err)
	}
	defer mallory.Close()
	if _, err := mallory.RequestMsg(forged, 10*time.Second); err != nil {
		t.Fatal(err)
	}
	o = <-got
	if o.Verified || strings.Contains(o.Who, "someone-else") || !strings.HasPrefix(o.Who, "reply-subject: ") ||
		!strings.Contains(o.Claimed, "unverified request-info: account=ENG user=someone-else") {
		t.Errorf("a header written in the daemon's account gave origin %+v, want the reply subject and an unverified claim", o)
	}
}

func TestRequestOrigin(t *testing.T) {
	for _, c := range []struct {
		name string
		hdr  micro.Headers
		want Origin
	}{
		{"no header", micro.Headers{}, Origin{Who: "reply-subject: _INBOX.abc"}},
		{"claimed", micro.Headers{HeaderOperator: {"bob@lab"}}, Origin{Who: "reply-subject: _INBOX.abc", Claimed: "bob@lab"}},
		{"request info written by the client", micro.Headers{HeaderRequestInfo: {`{"acc":"ENG","rtt":1000,"user":"ann","name":"x","host":"10.0.0.7","id":42}`}},
			Origin{Who: "reply-subject: _INBOX.abc", Claimed: "unverified request-info: account=ENG user=ann client=x host=10.0.0.7 cid=42"}},
		{"request info and operator written by the client", micro.Headers{HeaderOperator: {"bob@lab"}, HeaderRequestInfo: {`{"acc":"ENG","user":"ann"}`}},
			Origin{Who: "reply-subject: _INBOX.abc", Claimed: "bob@lab; unverified request-info: account=ENG user=ann"}},
		{"request info without identity", micro.Headers{HeaderRequestInfo: {`{"rtt":1000}`}}, Origin{Who: "reply-subject: _INBOX.abc"}},
		{"malformed request info", micro.Headers{HeaderRequestInfo: {`{"acc":`}}, Origin{Who: "reply-subject: _INBOX.abc"}},
	} {
		if got := RequestOrigin(c.hdr, "_INBOX.abc"); got != c.want {
			t.Errorf("%s: %+v, want %+v", c.name, got, c.want)
		}
	}
	// Through an import: the server's reply subject.
	h := micro.Headers{HeaderRequestInfo: {`{"acc":"ENG","user":"ann"}`}}
	if got, want := RequestOrigin(h, "_R_.abc.def"), (Origin{Who: "request-info: account=ENG user=ann", Verified: true}); got != want {
		t.Errorf("through an import: %+v, want %+v", got, want)
	}
}

func TestNumberJSON(t *testing.T) {
	for _, c := range []struct {
		v    float64
		want string
	}{{1.5, "1.5"}, {-0.25, "-0.25"}, {math.NaN(), "null"}, {math.Inf(1), "null"}} {
		b, err := json.Marshal(Number(c.v))
		if err != nil || string(b) != c.want {
			t.Errorf("Marshal(%v) = %s, %v; want %s", c.v, b, err, c.want)
		}
	}
	var n Number
	if err := json.Unmarshal([]byte("null"), &n); err != nil || !math.IsNaN(float64(n)) {
		t.Errorf("null → %v, %v", n, err)
	}
	if err := json.Unmarshal([]byte("2.5e-3"), &n); err != nil || n != 0.0025 {
		t.Errorf("2.5e-3 → %v, %v", n, err)
	}
	if err := json.Unmarshal([]byte(`"x"`), &n); err == nil {
		t.Error(`"x" read as a number`)
	}
}

// FuzzControlBodies feeds arbitrary bodies to the promote and reset
// decoding and to Reset: a request is accepted or refused as a bad request,
// never a panic, and an accepted reset runs a tick.
func FuzzControlBodies(f *testing.F) {
	for _, s := range []string{``, `{}`, `{"transfer":"adopt-state","confirm":true}`, `{"transfer":"keep-state"}`,
		`{"state":{"position":2},"std":{"position":1,"velocity":1}}`, `{"covariance":[[1,0],[0,1]]}`,
		`{"state":{"velocity":-1e308}}`, `{"covariance":[[1,0.5],[0.5]]}`, `{"std":{"position":-1}}`} {
		f.Add([]byte(s))
	}
	r := newCMRig(f, cmRigOptions{active: "fast", candidate: "kalman", dwell: -1})
	r.tick()
	f.Fuzz(func(t *testing.T, body []byte) {
		var pr PromoteRequest
		if err := decodeBody(body, &pr); err != nil {
			var ce *CommissionError
			if !errors.As(err, &ce) || ce.Code != CodeBadRequest {
				t.Fatalf("promote body %q: %v", body, err)
			}
		}
		var rr ResetRequest
		if err := decodeBody(body, &rr); err != nil {
			return
		}
		if _, err := r.c.Reset(rr, Origin{}); err != nil {
			var ce *CommissionError
			if !errors.As(err, &ce) || ce.Code != CodeBadRequest {
				t.Fatalf("reset %q: %v", body, err)
			}
			return
		}
		r.tick()
	})
}

// FuzzRequestOrigin: any header and reply subject give an origin of one of
// the two kinds.
func FuzzRequestOrigin(f *testing.F) {
	f.Add(`{"acc":"ENG","user":"ann","name":"x","host":"10.0.0.7","id":42}`, "_INBOX.abc", "ann@bench")
	f.Add(`{"acc":`, "", "")
	f.Add(`[]`, "_INBOX.x", "")
	f.Fuzz(func(t *testing.T, info, reply, claimed string) {
		h := micro.Headers{HeaderRequestInfo: {info}, HeaderOperator: {claimed}}
		o := RequestOrigin(h, reply)
		if !strings.HasPrefix(o.Who, "request-info: ") && o.Who != "reply-subject: "+reply {
			t.Fatalf("origin %q", o.Who)
		}
		if o.Verified != strings.HasPrefix(o.Who, "request-info: ") || o.Verified && !strings.HasPrefix(reply, "_R_.") {
			t.Fatalf("origin %q verified %v with reply %q", o.Who, o.Verified, reply)
		}
		if !strings.HasPrefix(o.Claimed, claimed) {
			t.Fatalf("claimed %q, want %q", o.Claimed, claimed)
		}
	})
}
