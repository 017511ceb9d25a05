package main

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
)

// TestSimulateFixtures runs the command written in
// testdata/recordings/README.md and compares what it writes with the
// committed recordings, byte for byte.
func TestSimulateFixtures(t *testing.T) {
	dir := t.TempDir()
	jsonl, csv := filepath.Join(dir, "r.jsonl"), filepath.Join(dir, "r.csv")
	stdout, stderr, code := cli(t, "simulate", plantPath("hotwater-loop.yaml"), "--seed", "7", "--start", "2026-01-05T08:00:00Z",
		"--for", "4m", "--out", jsonl, "--csv", csv)
	if code != 0 {
		t.Fatalf("exit %d: %s%s", code, stdout, stderr)
	}
	for got, want := range map[string]string{jsonl: "hotwater-loop-rehearsal.jsonl", csv: "hotwater-loop-rehearsal.csv"} {
		g, err := os.ReadFile(got)
		if err != nil {
			t.Fatal(err)
		}
		w, err := os.ReadFile(filepath.Join("..", "..", "testdata", "recordings", want))
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(g, w) {
			t.Errorf("%s differs from what the command in testdata/recordings/README.md writes now", want)
		}
	}
	if !strings.Contains(stdout, "240 samples") {
		t.Errorf("stdout %q does not count 240 samples", stdout)
	}
}

// TestSimulatePublishes publishes 30 s of plant time at 100 times real
// time to an embedded server and counts what a subscriber receives: one
// input, two outputs and four true states per sample, without faults in
// the steady scenario.
func TestSimulatePublishes(t *testing.T) {
	ns, err := daemon.StartEmbedded(daemon.EmbeddedOptions{Port: -1, StoreDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	defer func() { ns.Shutdown(); ns.WaitForShutdown() }()
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	var mu sync.Mutex
	counts := map[string]int{}
	if _, err := nc.Subscribe(">", func(m *nats.Msg) {
		mu.Lock()
		counts[m.Subject]++
		mu.Unlock()
	}); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	stdout, stderr, code := cli(t, "simulate", plantPath("hotwater-loop.yaml"), "--nats", ns.ClientURL(),
		"--scenario", "steady", "--for", "30s", "--speed", "100")
	if code != 0 {
		t.Fatalf("exit %d: %s%s", code, stdout, stderr)
	}
	for _, want := range []string{"sim.surmise.hotwater-loop.truth.heat_loss", "published 30 samples: 30 input, 60 output and 120 truth messages"} {
		if !strings.Contains(stdout, want) {
			t.Errorf("stdout does not say %q:\n%s", want, stdout)
		}
	}
	deadline := time.Now().Add(10 * time.Second)
	for {
		mu.Lock()
		total := 0
		for _, n := range counts {
			total += n
		}
		mu.Unlock()
		if total == 30*7 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("received %d messages, want 210: %v", total, counts)
		}
		time.Sleep(5 * time.Millisecond) // polling with a deadline
	}
	// By default everything goes out under the simulation prefix, nothing
	// on the plant's own subjects.
	if counts["sim.pilot.hwl.tt120.pv"] != 30 || counts["sim.surmise.hotwater-loop.truth.element_temp"] != 30 || counts["pilot.hwl.tt120.pv"] != 0 {
		t.Errorf("counts %v", counts)
	}
	// --prefix '' publishes on the wired subjects.
	if _, stderr, code := cli(t, "simulate", plantPath("hotwater-loop.yaml"), "--nats", ns.ClientURL(), "--prefix", "",
		"--scenario", "steady", "--for", "2s", "--speed", "100"); code != 0 {
		t.Fatalf("--prefix '': exit %d: %s", code, stderr)
	}
	checkFor := time.Now().Add(10 * time.Second)
	for {
		mu.Lock()
		n := counts["pilot.hwl.tt120.pv"]
		mu.Unlock()
		if n == 2 {
			break
		}
		if time.Now().After(checkFor) {
			t.Fatalf("%d messages on pilot.hwl.tt120.pv with --prefix '', want 2", n)
		}
		time.Sleep(5 * time.Millisecond) // polling with a deadline
	}
}

func TestSimulateUsage(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.yaml")
	if err := os.WriteFile(bad, []byte("events:\n  - {at: 0s, step: tank_outlet, value: 60}\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	plant := plantPath("hotwater-loop.yaml")
	for _, tc := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{plant, "--speed", "0"}, 2, "--speed 0"},
		{[]string{plant, "--out", "x.jsonl", "--speed", "2"}, 2, "--speed paces publishing"},
		{[]string{plant, "--start", "2026-01-05T08:00:00Z"}, 2, "--start is the time of the first sample"},
		{[]string{plant, "--initial", "random"}, 2, `--initial "random"`},
		{[]string{plant, "--scenario", "nonesuch"}, 2, "no such file, and not a built-in scenario"},
		{[]string{plant, "--scenario", bad}, 1, bad + `:2:20: events[0].step: "tank_outlet" is an output`},
		{[]string{}, 2, "want one plant file"},
		{[]string{plant, "--nats", "nats://127.0.0.1:1", "--for", "1s"}, 1, "is a server running?"},
		{[]string{plant, "--nats", "nats://[::1]:1", "--for", "1s"}, 1, "is a server running?"},
		{[]string{plant, "--nats", "nats://localhost:1", "--for", "1s"}, 1, "is a server running?"},
		// A server on another machine is refused before any connection.
		{[]string{plant, "--nats", "nats://plant-bus.example:4222"}, 2, "is not on this machine"},
		{[]string{plant, "--nats", "nats://127.0.0.1:1,nats://10.1.2.3:4222"}, 2, "nats://10.1.2.3:4222 is not on this machine"},
		{[]string{plant, "--nats", "nats://192.0.2.1:1", "--remote", "--for", "1s"}, 1, "is a server running?"},
		{[]string{plant, "--prefix", "sim"}, 2, `--prefix "sim": want subject tokens ending in a dot`},
		{[]string{plant, "--prefix", "sim.>."}, 2, `want subject tokens`},
		{[]string{plant, "--out", "x.jsonl", "--prefix", "x."}, 2, "they publish nothing"},
	} {
		stdout, stderr, code := cli(t, append([]string{"simulate"}, tc.args...)...)
		if code != tc.code || !strings.Contains(stdout+stderr, tc.want) {
			t.Errorf("%q: exit %d, output %s%s; want exit %d and %q", tc.args, code, stdout, stderr, tc.code, tc.want)
		}
	}
	// --print-scenario writes the built-in scenario as a file that
	// --scenario reads back.
	stdout, _, code := cli(t, "simulate", "--print-scenario", plant)
	if code != 0 || !strings.Contains(stdout, "jitter") {
		t.Fatalf("--print-scenario: exit %d, %s", code, stdout)
	}
	file := filepath.Join(dir, "printed.yaml")
	if err := os.WriteFile(file, []byte(stdout), 0o644); err != nil {
		t.Fatal(err)
	}
	again, _, code := cli(t, "simulate", "--print-scenario", "--scenario", file, plant)
	if code != 0 || again != stdout {
		t.Errorf("printed, read back and printed again: exit %d\n%s\nwant\n%s", code, again, stdout)
	}
}
