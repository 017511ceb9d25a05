package daemon

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"strings"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"
)

// The control service (DESIGN.md §5): one NATS micro service named
// ControlService per daemon, with one group of endpoints per estimator,
//
//	surmise.control.<estimator>.status    no body            → StatusReply
//	surmise.control.<estimator>.load      a gains file       → LoadReply
//	surmise.control.<estimator>.promote   PromoteRequest     → PromoteReply
//	surmise.control.<estimator>.rollback  no body            → RollbackReply
//	surmise.control.<estimator>.reset     ResetRequest       → ResetReply
//
// Replies are JSON. A refused request gets a micro error reply: the
// Nats-Service-Error-Code header holds the code (CodeBadRequest,
// CodeRefused, CodeInvalid), Nats-Service-Error the reason, and the body
// a ControlError. The service answers $SRV.PING, $SRV.INFO and $SRV.STATS
// discovery like every micro service.
const (
	// ControlService is the micro service name.
	ControlService = "surmise"
	// ControlVersion is the version of the control protocol (semantic
	// versioning, as micro requires), not of the program.
	ControlVersion = "1.0.0"
	// ControlRoot is the prefix of every control subject.
	ControlRoot = "surmise.control"
)

// The control verbs, the last token of their subjects.
const (
	VerbStatus   = "status"
	VerbLoad     = "load"
	VerbPromote  = "promote"
	VerbRollback = "rollback"
	VerbReset    = "reset"
)

// Headers of control requests.
const (
	// HeaderSet (load) names the set to run instead of the file's active
	// one.
	HeaderSet = "Surmise-Set"
	// HeaderCandidate (load) names the set to run in shadow instead of the
	// file's candidate; NoCandidate for none.
	HeaderCandidate = "Surmise-Candidate"
	// HeaderOperator is who the requester says it is (`surmise ctl` sends
	// user@host). It is recorded as claimed_by in the audit trail and
	// checked by nothing.
	HeaderOperator = "Surmise-Operator"
	// HeaderRequestInfo is the header a NATS server adds to a request that
	// crosses a service import between accounts, with the requesting
	// client's identity as the server knows it.
	HeaderRequestInfo = "Nats-Request-Info"
)

// NoCandidate is the value of HeaderCandidate that runs no shadow set.
const NoCandidate = "none"

// ControlSubject returns the subject of a verb of an estimator.
func ControlSubject(estimator, verb string) string {
	return ControlRoot + "." + estimator + "." + verb
}

// ControlError is the body of a refused control request.
type ControlError struct {
	Code   string   `json:"code"`
	Error  string   `json:"error"`
	Detail []string `json:"detail,omitempty"`
}

// StartControl adds the control service for the commissioners' estimators
// to the connection nc and returns it; Stop it before the connection
// closes. Requests are handled on the connection's delivery goroutines, one
// at a time per endpoint. There is no queue group: a request reaches every
// daemon that runs the estimator (there should be one), and the requester
// takes the first reply.
func StartControl(nc *nats.Conn, comms []*Commissioner) (micro.Service, error) {
	names := make([]string, len(comms))
	for i, c := range comms {
		names[i] = c.Name()
	}
	svc, err := micro.AddService(nc, micro.Config{
		Name:               ControlService,
		Version:            ControlVersion,
		Description:        "Surmise estimators: gains, shadow candidate, promotion, roll-back, reset",
		Metadata:           map[string]string{"estimators": strings.Join(names, ",")},
		QueueGroupDisabled: true,
	})
	if err != nil {
		return nil, fmt.Errorf("control service: %w", err)
	}
	for _, c := range comms {
		g := svc.AddGroup(ControlRoot+"."+c.Name(), micro.WithGroupQueueGroupDisabled())
		meta := micro.WithEndpointMetadata(map[string]string{"estimator": c.Name()})
		for _, ep := range []struct {
			verb string
			fn   func(*Commissioner, micro.Request) (any, error)
		}{
			{VerbStatus, handleStatus},
			{VerbLoad, handleLoad},
			{VerbPromote, handlePromote},
			{VerbRollback, handleRollback},
			{VerbReset, handleReset},
		} {
			c, fn := c, ep.fn
			h := micro.HandlerFunc(func(req micro.Request) {
				v, err := fn(c, req)
				respond(req, v, err)
			})
			if err := g.AddEndpoint(ep.verb, h, meta); err != nil {
				svc.Stop()
				return nil, fmt.Errorf("control service: %s %s: %w", c.Name(), ep.verb, err)
			}
		}
	}
	return svc, nil
}

// respond sends the reply v, or the error err.
func respond(req micro.Request, v any, err error) {
	if err == nil {
		rerr := req.RespondJSON(v)
		if rerr == nil {
			return
		}
		err = refusal("500", "reply not sent: %v", rerr)
	}
	var ce *CommissionError
	if !errors.As(err, &ce) {
		ce = &CommissionError{Code: "500", Reason: err.Error()}
	}
	body, _ := json.Marshal(ControlError{Code: ce.Code, Error: ce.Reason, Detail: ce.Detail})
	// A header value is one line.
	desc := strings.ReplaceAll(ce.Reason, "\n", " ")
	_ = req.Error(ce.Code, desc, body)
}

// RequestOrigin says who sent a control request, as far as the bus tells:
// the client identity in the Nats-Request-Info header when the server added
// one (on a request that came through a service import from another
// account; within one account a client could write the header itself, so it
// is trustworthy only where the deployment routes control requests through
// an import), else the request's reply subject, which names the requesting
// connection's inbox. The Surmise-Operator header goes to Claimed.
func RequestOrigin(h micro.Headers, reply string) Origin {
	o := Origin{Claimed: h.Get(HeaderOperator)}
	if raw := h.Get(HeaderRequestInfo); raw != "" {
		var ci struct {
			Account string `json:"acc"`
			User    string `json:"user"`
			Name    string `json:"name"`
			Host    string `json:"host"`
			ID      uint64 `json:"id"`
			Server  string `json:"server"`
		}
		if err := json.Unmarshal([]byte(raw), &ci); err == nil {
			var parts []string
			for _, kv := range [][2]string{{"account", ci.Account}, {"user", ci.User}, {"client", ci.Name}, {"host", ci.Host}, {"server", ci.Server}} {
				if kv[1] != "" {
					parts = append(parts, kv[0]+"="+kv[1])
				}
			}
			if ci.ID != 0 {
				parts = append(parts, fmt.Sprintf("cid=%d", ci.ID))
			}
			if len(parts) > 0 {
				o.Who = "request-info: " + strings.Join(parts, " ")
				return o
			}
		}
	}
	o.Who = "reply-subject: " + reply
	return o
}

func origin(req micro.Request) Origin { return RequestOrigin(req.Headers(), req.Reply()) }

// decodeBody decodes a JSON request body strictly into v; an empty body
// leaves v as it is.
func decodeBody(data []byte, v any) error {
	if len(bytes.TrimSpace(data)) == 0 {
		return nil
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		return refusal(CodeBadRequest, "request body: %v", err)
	}
	if dec.More() {
		return refusal(CodeBadRequest, "request body: more than one JSON value")
	}
	return nil
}

func handleStatus(c *Commissioner, req micro.Request) (any, error) {
	return c.Status(), nil
}

func handleLoad(c *Commissioner, req micro.Request) (any, error) {
	data := req.Data()
	if len(bytes.TrimSpace(data)) == 0 {
		return nil, refusal(CodeBadRequest, "load: the request body must be a gains file")
	}
	var sel Selection
	h := req.Headers()
	sel.Active = h.Get(HeaderSet)
	if vs := h.Values(HeaderCandidate); len(vs) > 0 {
		v := vs[0]
		if v == NoCandidate {
			v = ""
		}
		sel.Candidate = &v
	}
	return c.Load(data, "control request", sel, TriggerControl, origin(req))
}

func handlePromote(c *Commissioner, req micro.Request) (any, error) {
	var pr PromoteRequest
	if err := decodeBody(req.Data(), &pr); err != nil {
		return nil, err
	}
	return c.Promote(pr, origin(req))
}

func handleRollback(c *Commissioner, req micro.Request) (any, error) {
	if err := decodeBody(req.Data(), &struct{}{}); err != nil {
		return nil, err
	}
	return c.Rollback(origin(req))
}

func handleReset(c *Commissioner, req micro.Request) (any, error) {
	var rr ResetRequest
	if err := decodeBody(req.Data(), &rr); err != nil {
		return nil, err
	}
	return c.Reset(rr, origin(req))
}
