package main

import (
	"bufio"
	"bytes"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"
	"github.com/santhosh-tekuri/jsonschema/v6"

	"surmise/daemon"
)

// schemaDir holds the JSON Schemas of the messages, under daemon/schema.
var schemaDir = filepath.Join("..", "..", "daemon", "schema")

// compileSchema compiles the schema in file, or its definition def ("" for
// the whole file), asserting formats such as date-time.
func compileSchema(t *testing.T, file, def string) *jsonschema.Schema {
	t.Helper()
	path, err := filepath.Abs(filepath.Join(schemaDir, file))
	if err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	doc, err := jsonschema.UnmarshalJSON(f)
	if err != nil {
		t.Fatalf("%s: %v", file, err)
	}
	c := jsonschema.NewCompiler()
	c.AssertFormat()
	url := "file://" + filepath.ToSlash(path)
	if err := c.AddResource(url, doc); err != nil {
		t.Fatal(err)
	}
	loc := url
	if def != "" {
		loc += "#/$defs/" + def
	}
	s, err := c.Compile(loc)
	if err != nil {
		t.Fatalf("%s: %v", loc, err)
	}
	return s
}

// validate checks one message against a schema.
func validate(t *testing.T, s *jsonschema.Schema, what string, data []byte) {
	t.Helper()
	v, err := jsonschema.UnmarshalJSON(bytes.NewReader(data))
	if err != nil {
		t.Errorf("%s is not JSON: %v\n%s", what, err, data)
		return
	}
	if err := s.Validate(v); err != nil {
		t.Errorf("%s does not match %s: %v\n%s", what, s.Location, err, data)
	}
}

// TestMessagesMatchSchemas validates the messages a running daemon
// publishes and answers — an estimate, a shadow estimate, every control
// reply and refusal, the audit trail — against the schemas under daemon/schema/,
// and the service's metadata against them: each endpoint names a request
// and reply definition that exists.
func TestMessagesMatchSchemas(t *testing.T) {
	c := startCtlDaemon(t)
	// The local user: the control service is not an anonymous client's.
	nc, err := nats.Connect(c.url, nats.UserInfo(localUser(t, c)))
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()

	estimate := compileSchema(t, "estimate.schema.json", "")
	for _, subj := range []string{"surmise.cart.estimate", "surmise.cart.shadow.estimate"} {
		sub, err := nc.SubscribeSync(subj)
		if err != nil {
			t.Fatal(err)
		}
		for i := 0; i < 3; i++ {
			msg, err := sub.NextMsg(20 * time.Second)
			if err != nil {
				t.Fatalf("%s: %v", subj, err)
			}
			validate(t, estimate, subj, msg.Data)
		}
		sub.Unsubscribe()
	}

	request := func(verb string, body []byte, hdr map[string]string) *nats.Msg {
		t.Helper()
		msg := &nats.Msg{Subject: daemon.ControlSubject("cart", verb), Data: body, Header: nats.Header{}}
		for k, v := range hdr {
			msg.Header.Set(k, v)
		}
		reply, err := nc.RequestMsg(msg, 10*time.Second)
		if err != nil {
			t.Fatalf("%s: %v", verb, err)
		}
		return reply
	}
	errSchema := compileSchema(t, "control.schema.json", "error")
	for _, step := range []struct {
		verb, reqDef, replyDef string
		body                   string
		hdr                    map[string]string
		wantCode               string
	}{
		{daemon.VerbStatus, "", "status-reply", "", nil, ""},
		{daemon.VerbPromote, "promote-request", "promote-reply", `{"transfer": "adopt-state"}`, nil, ""},
		{daemon.VerbPromote, "promote-request", "promote-reply", `{"transfer": "adopt-state", "confirm": true}`, nil, ""},
		{daemon.VerbRollback, "", "rollback-reply", "", nil, ""},
		{daemon.VerbReset, "reset-request", "reset-reply", `{"state": {"position": 5}, "std": {"position": 1, "velocity": 0.5}}`, nil, ""},
		{daemon.VerbReset, "reset-request", "reset-reply", `{"state": {"position": 5}, "std": {"position": 1, "velocity": 0.5}, "confirm": true}`, nil, ""},
		{daemon.VerbReset, "reset-request", "", `{"state": {"speed": 1}}`, nil, "400"},
		{daemon.VerbPromote, "promote-request", "", `{}`, nil, "409"},
		{daemon.VerbLoad, "", "load-reply", "@gains", map[string]string{daemon.HeaderSource: "cart.gains.yaml"}, ""},
		{daemon.VerbLoad, "", "", "@plant", map[string]string{daemon.HeaderSource: "cart.yaml"}, "422"},
		{daemon.VerbStatus, "", "status-reply", "", nil, ""},
	} {
		body := []byte(step.body)
		switch step.body {
		case "@gains":
			body, err = os.ReadFile(c.gains)
		case "@plant":
			body, err = os.ReadFile(plantPathFor(c, "cart.yaml"))
		}
		if err != nil {
			t.Fatal(err)
		}
		what := step.verb + " " + step.body
		if step.reqDef != "" {
			validate(t, compileSchema(t, "control.schema.json", step.reqDef), what+" request", body)
		}
		reply := request(step.verb, body, step.hdr)
		code := reply.Header.Get(micro.ErrorCodeHeader)
		if code != step.wantCode {
			t.Fatalf("%s: code %q, want %q: %s", what, code, step.wantCode, reply.Data)
		}
		if code != "" {
			validate(t, errSchema, what+" refusal", reply.Data)
			if step.verb == daemon.VerbLoad && !strings.Contains(string(reply.Data), "cart.yaml:") {
				t.Errorf("the refusal of a loaded file does not name the file sent: %s", reply.Data)
			}
			continue
		}
		validate(t, compileSchema(t, "control.schema.json", step.replyDef), what+" reply", reply.Data)
	}

	// The audit trail in the state directory.
	audit := compileSchema(t, "control.schema.json", "audit-entry")
	f, err := os.Open(filepath.Join(c.stateDir, daemon.AuditFile))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	lines := 0
	for sc := bufio.NewScanner(f); sc.Scan(); lines++ {
		validate(t, audit, "audit line", sc.Bytes())
	}
	if lines < 4 {
		t.Errorf("%d audit lines, want at least 4", lines)
	}

	// Discovery: every endpoint describes itself and names definitions
	// that exist.
	reply, err := nc.Request("$SRV.INFO."+daemon.ControlService, nil, 10*time.Second)
	if err != nil {
		t.Fatal(err)
	}
	var info micro.Info
	if err := json.Unmarshal(reply.Data, &info); err != nil {
		t.Fatal(err)
	}
	if len(info.Endpoints) != 5 {
		t.Fatalf("%d endpoints, want 5", len(info.Endpoints))
	}
	for _, ep := range info.Endpoints {
		md := ep.Metadata
		if md["description"] == "" || md["request"] == "" {
			t.Errorf("endpoint %s: no description or request format in %v", ep.Name, md)
		}
		for _, key := range []string{"request_schema", "reply_schema", "error_schema"} {
			ref, ok := md[key]
			if !ok {
				continue
			}
			file, def, found := strings.Cut(ref, "#/$defs/")
			if !found || file != daemon.ControlSchema {
				t.Errorf("endpoint %s: %s %q is not %s#/$defs/NAME", ep.Name, key, ref, daemon.ControlSchema)
				continue
			}
			compileSchema(t, "control.schema.json", def)
		}
	}
}

// TestSampleSchema: the sample payloads `surmise simulate` wrote into the
// demo recording match daemon/schema/sample.schema.json, and for JSON payloads the
// schema and the daemon's decoder agree on what is a sample.
func TestSampleSchema(t *testing.T) {
	s := compileSchema(t, "sample.schema.json", "")
	f, err := os.Open(filepath.Join("..", "..", "testdata", "recordings", "hotwater-loop-rehearsal.jsonl"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	n := 0
	for sc := bufio.NewScanner(f); sc.Scan() && n < 500; {
		var line struct {
			Subject string `json:"subject"`
			Payload string `json:"payload"`
		}
		if err := json.Unmarshal(sc.Bytes(), &line); err != nil {
			t.Fatal(err)
		}
		if strings.Contains(line.Subject, ".truth.") || strings.HasSuffix(line.Subject, ".estimate") {
			continue
		}
		validate(t, s, line.Subject+" payload", []byte(line.Payload))
		n++
	}
	if n == 0 {
		t.Fatal("no sample payloads in the recording")
	}
	recv := time.Date(2026, 12, 2, 10, 0, 0, 0, time.UTC)
	for _, p := range []string{
		`61.2`, `-4e-3`, `{"value": 61.2}`, `{"value": 61.2, "time": "2026-12-02T10:00:00.123Z"}`,
		`{"value": 61.2, "time": "2026-12-02T11:00:00+01:00"}`, `{"value": 1, "time": null}`, `{"value": 1, "unit": "bar"}`,
		`{"time": "2026-12-02T10:00:00Z"}`, `{"value": "61.2"}`, `{"value": 1, "time": "2026-12-02T10:00:00"}`,
		`{"value": 1, "time": 1733133600}`, `"61.2"`, `[61.2]`, `true`, `null`,
	} {
		v, err := jsonschema.UnmarshalJSON(strings.NewReader(p))
		if err != nil {
			t.Fatal(err)
		}
		schemaOK := s.Validate(v) == nil
		_, _, derr := daemon.DecodeSample([]byte(p), recv)
		if schemaOK != (derr == nil) {
			t.Errorf("payload %s: schema accepts it %v, the daemon accepts it %v (%v)", p, schemaOK, derr == nil, derr)
		}
	}
}

// TestDivergedEstimateSchema validates the estimate of a diverged tick —
// no numbers, what diverged — and of the tick that re-initialised, as the
// engine writes them.
func TestDivergedEstimateSchema(t *testing.T) {
	s := compileSchema(t, "estimate.schema.json", "")
	nan := math.NaN()
	est := &daemon.Estimate{Estimator: "hotwater-loop", Instance: "bench-1", Time: time.Date(2026, 12, 4, 10, 0, 0, 0, time.UTC), Seq: 7, Status: daemon.StatusDiverged,
		Gains: "poles-prediction", Fingerprint: "sha256:00", Form: "prediction",
		Diverged: "state element_temp = 1e+04 is outside its range [0, 400]",
		States:   []daemon.StateEstimate{{Name: "element_temp", Unit: "degC", Value: nan, Std: nan}},
		Inputs:   []daemon.InputValue{{Name: "heater_power", Unit: "kW", Value: 6, Age: 0.1}},
		Outputs:  []daemon.OutputEstimate{{Name: "tank_outlet", Unit: "degC", Measured: 61, Predicted: nan, Innovation: nan, InnovationStd: nan, Age: 0.1}},
		NIS:      nan, NISMean: nan, NISBand: [2]float64{nan, nan}}
	data := est.AppendJSON(nil)
	if !strings.Contains(string(data), `"status":"diverged","diverged":"state element_temp`) {
		t.Errorf("diverged estimate %s", data)
	}
	validate(t, s, "diverged estimate", data)
	est.Status, est.Diverged, est.Reinitialised = daemon.StatusTracking, "", true
	est.States[0].Value, est.States[0].Std = 91.2, 5
	validate(t, s, "re-initialised estimate", est.AppendJSON(nil))
}
