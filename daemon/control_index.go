package daemon

import (
	"fmt"
	"slices"
	"strings"
	"sync"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/micro"
)

// ControlIndex is the set of estimators a daemon's control service answers
// for. The service has one endpoint per verb, on the subject
// ControlSubject("*", verb); each request is routed by the estimator token
// of its subject through the index. Estimators may be added and removed
// while the service runs (a fleet daemon gains and loses estimators as their
// ownership moves); a request for an estimator not in the index gets no
// reply from this daemon, because on a shared bus another daemon may run it.
// It is safe for concurrent use.
type ControlIndex struct {
	mu     sync.RWMutex
	comms  map[string]*Commissioner
	serves func(name string) bool // nil: every estimator in the index
}

// ServeOnly makes the index answer for the estimator name only while
// serves(name) is true: a standby daemon, or one whose lease lapsed in an
// outage, stays silent like a daemon that does not run the estimator, so
// that a promote or a reset reaches the daemon that publishes and no other.
// serves is called from the connection's delivery goroutines.
func (x *ControlIndex) ServeOnly(serves func(name string) bool) {
	x.mu.Lock()
	x.serves = serves
	x.mu.Unlock()
}

// NewControlIndex returns an empty index.
func NewControlIndex() *ControlIndex {
	return &ControlIndex{comms: map[string]*Commissioner{}}
}

// Add routes the requests for c's estimator to c, replacing an earlier
// commissioner of the same name.
func (x *ControlIndex) Add(c *Commissioner) {
	x.mu.Lock()
	x.comms[c.Name()] = c
	x.mu.Unlock()
}

// Remove stops routing the requests for the estimator name.
func (x *ControlIndex) Remove(name string) {
	x.mu.Lock()
	delete(x.comms, name)
	x.mu.Unlock()
}

// Lookup returns the commissioner of the estimator name, unless the index
// does not serve it now (ServeOnly).
func (x *ControlIndex) Lookup(name string) (*Commissioner, bool) {
	x.mu.RLock()
	c, ok := x.comms[name]
	serves := x.serves
	x.mu.RUnlock()
	if ok && serves != nil && !serves(name) {
		return nil, false
	}
	return c, ok
}

// Names returns the estimators in the index, sorted.
func (x *ControlIndex) Names() []string {
	x.mu.RLock()
	names := make([]string, 0, len(x.comms))
	for n := range x.comms {
		names = append(names, n)
	}
	x.mu.RUnlock()
	slices.Sort(names)
	return names
}

// StartControlIndex adds the control service to the connection nc and
// returns it; Stop it before the connection closes. It has five endpoints
// whatever the number of estimators (one subscription each, on
// surmise.control.*.<verb>), so a daemon of thousands of estimators has no
// more of them than a daemon of one. Requests are handled on the
// connection's delivery goroutines, one at a time per verb. There is no
// queue group: a request reaches every daemon on the bus, only the one that
// runs the estimator answers, and the requester takes the first reply.
func StartControlIndex(nc *nats.Conn, idx *ControlIndex) (micro.Service, error) {
	svc, err := micro.AddService(nc, micro.Config{
		Name:               ControlService,
		Version:            ControlVersion,
		Description:        "Surmise estimators: gains, shadow candidate, promotion, roll-back, reset",
		QueueGroupDisabled: true,
	})
	if err != nil {
		return nil, fmt.Errorf("control service: %w", err)
	}
	prefix := ControlRoot + "."
	for _, ep := range controlEndpoints {
		fn := ep.fn
		meta := ep.metadata("*")
		meta["estimator"] = "the estimator is the subject's third token: " + ControlSubject("<estimator>", ep.verb)
		h := micro.HandlerFunc(func(req micro.Request) {
			// surmise.control.<estimator>.<verb>: the estimator is the
			// token between the root and the verb.
			name, ok := strings.CutPrefix(req.Subject(), prefix)
			if !ok {
				return
			}
			name, _, _ = strings.Cut(name, ".")
			c, ok := idx.Lookup(name)
			if !ok {
				return // not ours: another daemon may run it
			}
			v, err := fn(c, req)
			respond(req, v, err)
		})
		if err := svc.AddEndpoint(ep.verb, h, micro.WithEndpointSubject(ControlSubject("*", ep.verb)),
			micro.WithEndpointQueueGroupDisabled(), micro.WithEndpointMetadata(meta)); err != nil {
			svc.Stop()
			return nil, fmt.Errorf("control service: %s: %w", ep.verb, err)
		}
	}
	return svc, nil
}
