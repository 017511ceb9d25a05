package daemon_test

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
)

// fleetFiles returns the plant and gains files of the cart "cart-NN": the
// hand-written double integrator of testdata/config under another name,
// with subjects of its own (bench.cart-NN.…).
func fleetFiles(t testing.TB, i int) (name string, plant, gains []byte) {
	t.Helper()
	dir := filepath.Join("..", "testdata", "config")
	p, err := os.ReadFile(filepath.Join(dir, "double-integrator.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	g, err := os.ReadFile(filepath.Join(dir, "double-integrator.gains.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	name = fmt.Sprintf("cart-%02d", i)
	plant = []byte(strings.NewReplacer("name: double-integrator", "name: "+name, "bench.cart.", "bench."+name+".").Replace(string(p)))
	gains = []byte(strings.Replace(string(g), "plant: double-integrator", "plant: "+name, 1))
	return name, plant, gains
}

// publishers watches every estimate of a bus and remembers, per estimator,
// the instance of each estimate with its time of arrival.
type publishers struct {
	mu   sync.Mutex
	seen map[string][]sighting
}

type sighting struct {
	instance string
	at       time.Time
}

func watchPublishers(t testing.TB, url string) *publishers {
	t.Helper()
	nc, err := nats.Connect(url, nats.MaxReconnects(-1), nats.ReconnectWait(100*time.Millisecond))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	p := &publishers{seen: map[string][]sighting{}}
	if _, err := nc.Subscribe("surmise.*.estimate", func(m *nats.Msg) {
		var est struct{ Estimator, Instance string }
		if err := json.Unmarshal(m.Data, &est); err != nil {
			return
		}
		p.mu.Lock()
		p.seen[est.Estimator] = append(p.seen[est.Estimator], sighting{est.Instance, time.Now()})
		p.mu.Unlock()
	}); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	return p
}

// since returns, per estimator, the instances that published since t.
func (p *publishers) since(t time.Time) map[string][]string {
	p.mu.Lock()
	defer p.mu.Unlock()
	out := map[string][]string{}
	for name, ss := range p.seen {
		for _, s := range ss {
			if !s.at.Before(t) && !slices.Contains(out[name], s.instance) {
				out[name] = append(out[name], s.instance)
			}
		}
	}
	return out
}

// overlap returns the longest time during which two instances published
// the same estimator at once. Each instance's estimates of an estimator are
// merged into spans of activity (gaps of at most gap between them), and the
// result is the longest intersection of two spans of different instances:
// a hand-over with a gap scores nothing, a lone estimate of one instance
// inside the other's span scores zero, and two daemons ticking side by side
// score the time they did.
func (p *publishers) overlap(gap time.Duration) (worst time.Duration, who string) {
	p.mu.Lock()
	defer p.mu.Unlock()
	type span struct {
		inst       string
		start, end time.Time
	}
	for name, ss := range p.seen {
		open := map[string]*span{}
		var spans []*span
		for _, s := range ss {
			if sp := open[s.instance]; sp != nil && s.at.Sub(sp.end) <= gap {
				sp.end = s.at
				continue
			}
			sp := &span{s.instance, s.at, s.at}
			open[s.instance] = sp
			spans = append(spans, sp)
		}
		for i, a := range spans {
			for _, b := range spans[i+1:] {
				if a.inst == b.inst {
					continue
				}
				start, end := a.start, a.end
				if b.start.After(start) {
					start = b.start
				}
				if b.end.Before(end) {
					end = b.end
				}
				if d := end.Sub(start); d > worst {
					worst, who = d, fmt.Sprintf("%s: %s and %s from %s", name, a.inst, b.inst, start.Format("15:04:05.000"))
				}
			}
		}
	}
	return worst, who
}

// onePublisherEach checks, over the estimates since t, that every one of
// names is published by exactly one instance, and returns who publishes
// each.
func onePublisherEach(names []string, seen map[string][]string) (map[string]string, error) {
	owner := map[string]string{}
	var problems []string
	for _, n := range names {
		switch len(seen[n]) {
		case 0:
			problems = append(problems, n+": not published")
		case 1:
			owner[n] = seen[n][0]
		default:
			problems = append(problems, fmt.Sprintf("%s: published by %v", n, seen[n]))
		}
	}
	if len(problems) > 0 {
		return nil, fmt.Errorf("%d of %d: %s", len(problems), len(names), strings.Join(problems, "; "))
	}
	return owner, nil
}

// TestFleetInProcess runs two fleet daemons on one embedded server with six
// carts in the bucket: each cart is published by exactly one of them, both
// have a share; a gains update in the bucket reaches the owner; when one
// stops, the other publishes every cart within 10 s, from the checkpoints.
func TestFleetInProcess(t *testing.T) {
	nc := recTestServer(t)
	url := nc.ConnectedUrl()
	ctx := context.Background()
	store, err := daemon.OpenFleet(ctx, nc, "bench", 0, 2*time.Second)
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	var lastGains []byte
	for i := range 6 {
		name, plant, gains := fleetFiles(t, i)
		if _, _, err := store.Put(ctx, name, plant, gains); err != nil {
			t.Fatal(err)
		}
		names, lastGains = append(names, name), gains
	}
	pub := watchPublishers(t, url)
	fleet := func(inst string) *running {
		return startDaemon(t, daemon.Options{Bus: daemon.BusOptions{URL: url}, Instance: inst,
			Fleet: &daemon.FleetOptions{Name: "bench", CheckpointEvery: 500 * time.Millisecond}, MinDwell: -1})
	}
	a, b := fleet("bench-a"), fleet("bench-b")
	_ = b

	var owners map[string]string
	checkFor(t, 20*time.Second, 200*time.Millisecond, func() error {
		o, err := onePublisherEach(names, pub.since(time.Now().Add(-time.Second)))
		if err != nil {
			return err
		}
		count := map[string]int{}
		for _, inst := range o {
			count[inst]++
		}
		if count["bench-a"] == 0 || count["bench-b"] == 0 {
			return fmt.Errorf("shares %v: want both daemons to run some", count)
		}
		owners = o
		return nil
	})
	t.Logf("owners: %v", owners)

	// New gains in the bucket go through the owner's check and swap: a
	// file it refuses (the fixed-gain set as candidate has no S, which
	// the plant's gate needs) leaves the running set; a good one (kf
	// active, no candidate) is swapped in. Only the gains' revision
	// changes.
	last := names[len(names)-1]
	status := func() (daemon.StatusReply, error) {
		var st daemon.StatusReply
		reply, err := nc.Request(daemon.ControlSubject(last, daemon.VerbStatus), nil, time.Second)
		if err == nil {
			err = json.Unmarshal(reply.Data, &st)
		}
		return st, err
	}
	before, _, _ := store.Get(ctx, last)
	active := regexp.MustCompile(`(?m)^active: (\S+)$`).FindStringSubmatch(string(lastGains))[1]
	swapped := strings.Replace(strings.Replace(string(lastGains), "active: "+active, "active: kf", 1), "candidate: kf", "candidate: "+active, 1)
	if _, _, err := store.Put(ctx, last, before.Plant, []byte(swapped)); err != nil {
		t.Fatal(err)
	}
	checkFor(t, 10*time.Second, 100*time.Millisecond, func() error {
		st, err := status()
		if err != nil {
			return err
		}
		if st.LastReload == nil || st.LastReload.Result != "refused" || st.Active.Name != active {
			return fmt.Errorf("%s runs %q, last reload %+v: want the refused file's reload and %s kept", last, st.Active.Name, st.LastReload, active)
		}
		return nil
	})
	good := strings.Replace(strings.Replace(string(lastGains), "active: "+active, "active: kf", 1), "candidate: kf\n", "", 1)
	if _, _, err := store.Put(ctx, last, before.Plant, []byte(good)); err != nil {
		t.Fatal(err)
	}
	after, _, _ := store.Get(ctx, last)
	if after.PlantRev != before.PlantRev || after.GainsRev <= before.GainsRev {
		t.Errorf("revisions plant %d→%d gains %d→%d: want only the gains changed", before.PlantRev, after.PlantRev, before.GainsRev, after.GainsRev)
	}
	checkFor(t, 10*time.Second, 100*time.Millisecond, func() error {
		st, err := status()
		if err != nil {
			return err
		}
		if st.Active.Name != "kf" {
			return fmt.Errorf("%s runs %q", last, st.Active.Name)
		}
		return nil
	})

	// Stop a: b publishes everything within 10 s, starting from the
	// checkpoints a saved.
	if err := a.stop(); err != nil {
		t.Fatal(err)
	}
	stopped := time.Now()
	checkFor(t, 10*time.Second, 100*time.Millisecond, func() error {
		o, err := onePublisherEach(names, pub.since(time.Now().Add(-500*time.Millisecond)))
		if err != nil {
			return err
		}
		for n, inst := range o {
			if inst != "bench-b" {
				return fmt.Errorf("%s still published by %s", n, inst)
			}
		}
		return nil
	})
	t.Logf("all published by bench-b %v after bench-a stopped", time.Since(stopped).Round(time.Millisecond))
	if worst, who := pub.overlap(250 * time.Millisecond); worst > 100*time.Millisecond {
		t.Errorf("two publishers for %v (%s), want at most a tick (100 ms)", worst, who)
	}
	// The new owner checkpoints every estimator it took.
	checkFor(t, 10*time.Second, 100*time.Millisecond, func() error {
		for _, n := range names {
			cp, err := store.Checkpoint(ctx, n)
			if err != nil || cp == nil || len(cp.State) != 2 || cp.Instance != "bench-b" {
				return fmt.Errorf("checkpoint of %s: %+v, %v", n, cp, err)
			}
		}
		return nil
	})
}
