package daemon

import (
	"context"
	"fmt"
	"hash/fnv"
	"runtime"
	"sync"

	"github.com/nats-io/nats.go"
)

// The samples of every estimator reach their engines through one dispatch
// path whose goroutines do not grow with the number of estimators. The NATS
// client gives an asynchronous subscription a goroutine of its own and wakes
// it for every message; at a thousand estimators of five signals that is
// five thousand goroutines and a wake-up per sample. Instead, every signal's
// subscription delivers into the channel of one of a few shards (nats.Conn's
// ChanSubscribe, which the client's reader fills without a goroutine of its
// own), and one goroutine per shard looks each message's subscription up in
// a map and hands the sample to its estimator. The signals of one estimator
// all go to the same shard (chosen by its name), so its samples keep the
// order in which the client received them.

// Channel capacity of a shard, per signal routed to it, and its bounds. A
// full channel drops the sample and the client reports a slow consumer,
// like the per-subscription pending limit it replaces: a backlog is only
// ever a symptom of a process that cannot keep up, and its samples are
// mostly too old to be used (only the newest per tick is).
const (
	shardSlotsPerSignal = 64
	shardMinSlots       = 1024
	shardMaxSlots       = 1 << 16
)

// sampleRouter is the dispatch path of a daemon's samples.
type sampleRouter struct {
	shards []*sampleShard
}

// sampleShard is one channel of the router, its routes and its goroutine.
type sampleShard struct {
	ch     chan *nats.Msg
	mu     sync.RWMutex
	routes map[*nats.Subscription]route
}

// route is where the messages of one subscription go.
type route struct {
	e *Estimator
	s *signal
}

// newSampleRouter returns a router with one shard per CPU, at most four,
// sized for signals signals in all (more may be added; the channel does not
// grow).
func newSampleRouter(signals int) *sampleRouter {
	n := min(runtime.GOMAXPROCS(0), 4)
	slots := min(max(shardSlotsPerSignal*signals/n, shardMinSlots), shardMaxSlots)
	r := &sampleRouter{}
	for range n {
		r.shards = append(r.shards, &sampleShard{ch: make(chan *nats.Msg, slots), routes: map[*nats.Subscription]route{}})
	}
	return r
}

// shard returns the shard of the estimator named name.
func (r *sampleRouter) shard(name string) *sampleShard {
	h := fnv.New32a()
	h.Write([]byte(name))
	return r.shards[h.Sum32()%uint32(len(r.shards))]
}

// start runs one goroutine per shard in g until g stops.
func (r *sampleRouter) start(g *Group) {
	for i, sh := range r.shards {
		g.Go(fmt.Sprintf("samples %d", i), func(ctx context.Context) error {
			sh.run(ctx)
			return nil
		})
	}
}

// run hands each message of the shard's channel to its estimator until ctx
// is done.
func (sh *sampleShard) run(ctx context.Context) {
	for {
		select {
		case <-ctx.Done():
			return
		case m := <-sh.ch:
			sh.mu.RLock()
			rt, ok := sh.routes[m.Sub]
			sh.mu.RUnlock()
			if ok { // else unsubscribed since it arrived
				rt.e.receive(rt.s, m.Data)
			}
		}
	}
}

// subscribe subscribes to every signal of e. On error, the subscriptions
// made are undone.
func (r *sampleRouter) subscribe(nc *nats.Conn, e *Estimator) error {
	sh := r.shard(e.name)
	// Held while subscribing, so that a message that arrives at once waits
	// for its route.
	sh.mu.Lock()
	defer sh.mu.Unlock()
	subs := make([]*nats.Subscription, 0, len(e.signals))
	for i := range e.signals {
		s := &e.signals[i]
		sub, err := nc.ChanSubscribe(s.subject, sh.ch)
		if err != nil {
			for _, sub := range subs {
				sub.Unsubscribe()
				delete(sh.routes, sub)
			}
			return fmt.Errorf("estimator %s: subscribing to %s: %w", e.name, s.subject, err)
		}
		sh.routes[sub] = route{e: e, s: s}
		subs = append(subs, sub)
	}
	e.subs = subs
	return nil
}

// unsubscribe ends the subscriptions of e; samples of e already in the
// channel are dropped.
func (r *sampleRouter) unsubscribe(e *Estimator) {
	sh := r.shard(e.name)
	sh.mu.Lock()
	defer sh.mu.Unlock()
	for _, sub := range e.subs {
		sub.Unsubscribe()
		delete(sh.routes, sub)
	}
	e.subs = nil
}

// close ends every subscription of the router. The daemon calls it once
// the ticks have stopped, before it drains the connection: the samples that
// would still arrive have no tick left to use them, and draining tens of
// thousands of subscriptions one by one takes the client seconds.
func (r *sampleRouter) close() {
	for _, sh := range r.shards {
		sh.mu.Lock()
		for sub := range sh.routes {
			sub.Unsubscribe()
		}
		clear(sh.routes)
		sh.mu.Unlock()
	}
}
