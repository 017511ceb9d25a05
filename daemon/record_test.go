package daemon_test

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/config"
	"surmise/daemon"
	"surmise/daemon/recording"
	"surmise/daemon/simplant"
)

func TestCheckSubjects(t *testing.T) {
	for _, tc := range []struct {
		subjects []string
		ok       bool
	}{
		{[]string{"pilot.hwl.>"}, true},
		{[]string{"pilot.hwl.tt110.pv", "pilot.hwl.tt120.pv"}, true},
		{[]string{"pilot.*.pv", "surmise.>"}, true},
		{[]string{"a.b", "a.b.c"}, true}, // a.b does not match a.b.c
		{[]string{"a.*", "a.b.>"}, true}, // one token, or three and more
		{[]string{"pilot.>", "pilot.hwl.tt110.pv"}, false},
		{[]string{"pilot.*.pv", "pilot.hwl.*"}, false},
		{[]string{"a.b", "a.b"}, false},
		{[]string{"a.>", "a.*.c"}, false},
		{[]string{">", "x"}, false},
		{nil, false},
		{[]string{"a..b"}, false},
		{[]string{"a.>.b"}, false},
		{[]string{"a.b*"}, false},
		{[]string{"a b"}, false},
		{[]string{""}, false},
	} {
		err := daemon.CheckSubjects(tc.subjects)
		if (err == nil) != tc.ok {
			t.Errorf("%q: error %v, want ok %v", tc.subjects, err, tc.ok)
		}
	}
}

// recTestServer starts an embedded server for one test.
func recTestServer(t *testing.T) *nats.Conn {
	t.Helper()
	ns, err := daemon.StartEmbedded(daemon.EmbeddedOptions{Port: -1, StoreDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { ns.Shutdown(); ns.WaitForShutdown() })
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	return nc
}

// recDemoPlant loads the demo plant file.
func recDemoPlant(t testing.TB) *config.Plant {
	t.Helper()
	plant, err := config.LoadPlant(filepath.Join("..", "testdata", "plants", "hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	return plant
}

// TestRecorderStoppedMidway records a simulated plant publishing at 200
// times real time and stops the recorder while the plant still publishes:
// the file parses, without an issue, and holds every message the recorder
// counted, in receive order.
func TestRecorderStoppedMidway(t *testing.T) {
	nc := recTestServer(t)
	plant := recDemoPlant(t)
	sc, err := simplant.Builtin("rehearsal", plant)
	if err != nil {
		t.Fatal(err)
	}
	sim, err := simplant.New(plant, sc, simplant.Options{Seed: 4})
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "rec.jsonl")
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rec, err := daemon.StartRecorder(nc, recording.NewWriter(f), []string{"pilot.hwl.>", "surmise.hotwater-loop.truth.*"})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	pub := make(chan error, 1)
	go func() {
		_, err := simplant.Publish(ctx, nc, simplant.NewStream(sim), simplant.PublishOptions{Clock: simplant.Clock{Speed: 200}})
		pub <- err
	}()
	checkFor(t, 20*time.Second, 5*time.Millisecond, func() error {
		if n := rec.Count(); n < 300 {
			return fmt.Errorf("%d messages recorded, want 300", n)
		}
		return nil
	})
	if err := rec.Stop(); err != nil { // mid-way: the plant goes on publishing
		t.Fatal(err)
	}
	n := rec.Count()
	cancel()
	if err := <-pub; err != nil {
		t.Fatal(err)
	}
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	br, err := recording.ReadJSONL(bytes.NewReader(data), path)
	if err != nil {
		t.Fatal(err)
	}
	if len(br.Issues) != 0 {
		t.Errorf("issues: %v", br.Issues)
	}
	if len(br.Messages) != n {
		t.Errorf("%d messages in the file, the recorder counted %d", len(br.Messages), n)
	}
	subjects := map[string]bool{}
	for _, s := range br.Subjects {
		subjects[s] = true
	}
	for _, s := range []string{"pilot.hwl.jc100.out", "pilot.hwl.tt110.pv", "pilot.hwl.tt120.pv", "surmise.hotwater-loop.truth.heat_loss"} {
		if !subjects[s] {
			t.Errorf("no message on %s", s)
		}
	}
}

// TestRecordStream checks the recording stream of a fleet: created with
// its retention, updated in place, and exported to a file that reads back
// with the messages published after it was created, stamped with the times
// the server stored them.
func TestRecordStream(t *testing.T) {
	nc := recTestServer(t)
	ctx := context.Background()
	opts := daemon.RecordStreamOptions{Name: "PILOT", Subjects: []string{"pilot.hwl.>"}, MaxAge: time.Hour}
	cfg, err := daemon.EnsureRecordStream(ctx, nc, opts)
	if err != nil {
		t.Fatal(err)
	}
	if cfg.MaxAge != time.Hour || cfg.MaxBytes != -1 {
		t.Errorf("max age %v, max bytes %d; want 1h, -1 (unlimited)", cfg.MaxAge, cfg.MaxBytes)
	}
	opts.MaxBytes = 1 << 20
	if cfg, err = daemon.EnsureRecordStream(ctx, nc, opts); err != nil || cfg.MaxBytes != 1<<20 {
		t.Fatalf("update: max bytes %d, error %v; want %d", cfg.MaxBytes, err, 1<<20)
	}
	if _, err := daemon.EnsureRecordStream(ctx, nc, daemon.RecordStreamOptions{Name: "X", Subjects: []string{"x"}}); err == nil {
		t.Error("a stream without retention limits: no error")
	}
	before := time.Now()
	for i := range 50 {
		subj := "pilot.hwl.tt110.pv"
		if i%2 == 1 {
			subj = "pilot.hwl.jc100.out"
		}
		if err := nc.Publish(subj, simplant.AppendPayload(nil, float64(i), time.Now())); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.Publish("elsewhere", []byte("1")); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	var buf bytes.Buffer
	var n int
	checkFor(t, 10*time.Second, 10*time.Millisecond, func() error {
		buf.Reset()
		n, err = daemon.ExportStream(ctx, nc, "PILOT", recording.NewWriter(&buf))
		if err != nil {
			return err
		}
		if n != 50 {
			return fmt.Errorf("exported %d messages, want 50", n)
		}
		return nil
	})
	br, err := recording.ReadJSONL(&buf, "export")
	if err != nil {
		t.Fatal(err)
	}
	if len(br.Messages) != 50 || len(br.Issues) != 0 {
		t.Fatalf("%d messages, issues %v; want 50, none", len(br.Messages), br.Issues)
	}
	for i, m := range br.Messages {
		v, _, err := daemon.DecodeSample(m.Payload, m.Recv)
		if err != nil || v != float64(i) {
			t.Fatalf("message %d: value %v, error %v", i, v, err)
		}
		if m.Recv.Before(before.Add(-time.Second)) || m.Recv.After(time.Now()) {
			t.Errorf("message %d stored at %v, not during the test", i, m.Recv)
		}
	}
}
