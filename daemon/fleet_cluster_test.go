package daemon_test

import (
	"context"
	"fmt"
	"log/slog"
	"os"
	"os/exec"
	"os/signal"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
)

// clusterNode is one nats-server process of a test cluster.
type clusterNode struct {
	name, conf, url string
	cmd             *exec.Cmd
}

// startCluster writes the configuration of a three-node nats-server
// cluster with JetStream on random loopback ports and starts it.
func startCluster(t *testing.T, bin string) []*clusterNode {
	t.Helper()
	dir := t.TempDir()
	var client, route [3]int
	for i := range 3 {
		client[i], route[i] = freePort(t), freePort(t)
	}
	var routes []string
	for i := range 3 {
		routes = append(routes, fmt.Sprintf("nats-route://127.0.0.1:%d", route[i]))
	}
	var nodes []*clusterNode
	for i := range 3 {
		n := &clusterNode{name: fmt.Sprintf("n%d", i+1), url: fmt.Sprintf("nats://127.0.0.1:%d", client[i])}
		n.conf = filepath.Join(dir, n.name+".conf")
		conf := fmt.Sprintf(`server_name: %s
listen: 127.0.0.1:%d
jetstream { store_dir: %q, max_memory_store: 64MB, max_file_store: 256MB }
cluster { name: fleet-test, listen: 127.0.0.1:%d, routes: [%s] }
`, n.name, client[i], filepath.Join(dir, n.name), route[i], strings.Join(routes, ", "))
		if err := os.WriteFile(n.conf, []byte(conf), 0o644); err != nil {
			t.Fatal(err)
		}
		nodes = append(nodes, n)
	}
	for _, n := range nodes {
		n.start(t, bin)
	}
	return nodes
}

func (n *clusterNode) start(t *testing.T, bin string) {
	t.Helper()
	n.cmd = exec.Command(bin, "-c", n.conf)
	if err := n.cmd.Start(); err != nil {
		t.Fatal(err)
	}
	cmd := n.cmd
	t.Cleanup(func() { cmd.Process.Kill(); cmd.Wait() })
}

func (n *clusterNode) kill() {
	n.cmd.Process.Signal(syscall.SIGKILL)
	n.cmd.Wait()
}

// fleetProcess is a fleet daemon run as a process of this test binary (see
// TestFleetDaemonProcess), so that it can be killed for real.
type fleetProcess struct {
	instance string
	cmd      *exec.Cmd
}

func startFleetProcess(t *testing.T, urls, instance string) *fleetProcess {
	t.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^TestFleetDaemonProcess$")
	cmd.Env = append(os.Environ(), "SURMISE_FLEET_DAEMON="+urls+"|"+instance)
	log, err := os.Create(filepath.Join(t.TempDir(), instance+".log"))
	if err != nil {
		t.Fatal(err)
	}
	cmd.Stdout, cmd.Stderr = log, log
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		cmd.Process.Kill()
		cmd.Wait()
		log.Close()
		if t.Failed() {
			if data, err := os.ReadFile(log.Name()); err == nil {
				t.Logf("log of %s:\n%s", instance, data)
			}
		}
	})
	return &fleetProcess{instance: instance, cmd: cmd}
}

func (p *fleetProcess) kill() {
	p.cmd.Process.Signal(syscall.SIGKILL)
	p.cmd.Wait()
}

// TestFleetDaemonProcess is a fleet daemon of TestFleetCluster, run in a
// process of its own: with SURMISE_FLEET_DAEMON=urls|instance it joins the
// fleet "plant" with default settings until it is killed or interrupted.
func TestFleetDaemonProcess(t *testing.T) {
	v := os.Getenv("SURMISE_FLEET_DAEMON")
	if v == "" {
		t.Skip("a daemon of TestFleetCluster, run by it")
	}
	urls, instance, _ := strings.Cut(v, "|")
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	d, err := daemon.New(daemon.Options{
		Bus:      daemon.BusOptions{URL: urls, ReconnectWait: 250 * time.Millisecond, ReconnectJitter: 100 * time.Millisecond},
		Instance: instance, Fleet: &daemon.FleetOptions{Name: "plant"}, Listen: "127.0.0.1:0",
		Logger: slog.New(slog.NewTextHandler(os.Stderr, nil)), Notify: func(string) error { return nil },
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := d.Run(ctx); err != nil {
		t.Fatal(err)
	}
}

// TestFleetCluster runs 20 carts on three fleet daemons (processes) over a
// three-node nats-server cluster with JetStream (processes, random loopback
// ports), with the default lease time-to-live. Each cart is published by
// exactly one daemon; after kill -9 of a daemon, every cart is published
// again within 10 s, still by one; after kill -9 of a NATS node, the same;
// when both come back, the returning daemon gets a share again. Over the
// whole run no cart is published by two daemons for more than a tick.
func TestFleetCluster(t *testing.T) {
	bin := natsServerBinary(t)
	nodes := startCluster(t, bin)
	ctx := context.Background()

	// The cluster is ready when a replicated bucket can be made.
	var store *daemon.FleetStore
	var admin *nats.Conn
	checkFor(t, 30*time.Second, 200*time.Millisecond, func() error {
		nc, err := nats.Connect(nodes[2].url)
		if err != nil {
			return err
		}
		cctx, cancel := context.WithTimeout(ctx, 5*time.Second)
		defer cancel()
		s, err := daemon.OpenFleet(cctx, nc, "plant", 0, 0)
		if err != nil {
			nc.Close()
			return err
		}
		store, admin = s, nc
		return nil
	})
	defer admin.Close()
	if store.Replicas() != 3 {
		t.Errorf("replicas %d on a cluster, want 3", store.Replicas())
	}
	var names []string
	for i := range 20 {
		name, plant, gains := fleetFiles(t, i)
		if _, _, err := store.Put(ctx, name, plant, gains); err != nil {
			t.Fatal(err)
		}
		names = append(names, name)
	}
	// The watcher is on the node that stays up.
	pub := watchPublishers(t, nodes[2].url)
	urls := nodes[0].url + "," + nodes[1].url + "," + nodes[2].url
	daemons := []*fleetProcess{startFleetProcess(t, urls, "d1"), startFleetProcess(t, urls, "d2"), startFleetProcess(t, urls, "d3")}

	// converged waits until every cart is published by one daemon of
	// want, each of which has a share, judging the estimates of the last
	// 500 ms that arrived after start.
	converged := func(what string, start time.Time, limit time.Duration, want ...string) {
		t.Helper()
		var shares map[string]int
		checkFor(t, limit-time.Since(start), 100*time.Millisecond, func() error {
			from := time.Now().Add(-500 * time.Millisecond)
			if from.Before(start) {
				from = start
			}
			o, err := onePublisherEach(names, pub.since(from))
			if err != nil {
				return err
			}
			shares = map[string]int{}
			for _, inst := range o {
				shares[inst]++
			}
			for _, w := range want {
				if shares[w] == 0 {
					return fmt.Errorf("shares %v: %s has none", shares, w)
				}
			}
			if len(shares) != len(want) {
				return fmt.Errorf("shares %v, want only %v", shares, want)
			}
			return nil
		})
		t.Logf("%s: every cart published by one daemon after %v; shares %v", what, time.Since(start).Round(100*time.Millisecond), shares)
	}
	converged("start", time.Now(), 30*time.Second, "d1", "d2", "d3")

	daemons[0].kill()
	converged("d1 killed", time.Now(), 10*time.Second, "d2", "d3")

	// Every cart must be published again within 10 s of the node's death,
	// by one daemon each.
	nodes[0].kill()
	converged("NATS node n1 killed", time.Now(), 10*time.Second, "d2", "d3")

	nodes[0].start(t, bin)
	daemons[0] = startFleetProcess(t, urls, "d1")
	converged("n1 and d1 back", time.Now(), 30*time.Second, "d1", "d2", "d3")

	worst, who := pub.overlap(250 * time.Millisecond)
	t.Logf("longest time two daemons published one cart at once: %v %s", worst, who)
	if worst > 100*time.Millisecond {
		t.Errorf("two publishers for %v (%s), want at most a tick (100 ms)", worst, who)
	}
}
