package simplant

import (
	"bytes"
	"context"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
	"surmise/daemon/recording"
)

func TestAppendPayload(t *testing.T) {
	at := time.Date(2026, 1, 5, 9, 0, 1, 500_000_000, time.FixedZone("CET", 3600))
	got := string(AppendPayload(nil, 61.25, at))
	// The payload form daemon.DecodeSample reads, the time in UTC.
	if want := `{"value":61.25,"time":"2026-01-05T08:00:01.5Z"}`; got != want {
		t.Errorf("got %s, want %s", got, want)
	}
	v, tt, err := daemon.DecodeSample([]byte(got), time.Now())
	if err != nil || v != 61.25 || !tt.Equal(at) {
		t.Errorf("DecodeSample: %v %v %v", v, tt, err)
	}
}

// TestPublish runs the rehearsal on an embedded server 1000 times faster
// than real time and checks what a subscriber receives: every subject of
// the plant, payloads the daemon decodes, sample times one sample time
// (scaled) apart.
func TestPublish(t *testing.T) {
	plant := demoPlant(t)
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
	sub, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Close()
	var mu sync.Mutex
	times := map[string][]time.Time{}
	bad := 0
	s, err := sub.Subscribe(">", func(m *nats.Msg) {
		_, at, err := daemon.DecodeSample(m.Data, time.Now())
		mu.Lock()
		defer mu.Unlock()
		if err != nil {
			bad++
			return
		}
		times[m.Subject] = append(times[m.Subject], at)
	})
	if err != nil {
		t.Fatal(err)
	}
	if err := sub.Flush(); err != nil {
		t.Fatal(err)
	}
	sc, err := Builtin("steady", plant)
	if err != nil {
		t.Fatal(err)
	}
	sim, err := New(plant, sc, Options{Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	start := time.Now()
	const samples = 200
	stats, err := Publish(context.Background(), nc, NewStream(sim), PublishOptions{
		Clock: Clock{Start: start, Speed: 1000},
		For:   samples * time.Second,
	})
	if err != nil {
		t.Fatal(err)
	}
	if stats.Samples != samples || stats.Messages[Input] != samples || stats.Messages[Output] != 2*samples || stats.Messages[Truth] != 4*samples {
		t.Fatalf("stats %+v, want %d samples of 1 input, 2 outputs, 4 states", stats, samples)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	subjects := []string{"pilot.hwl.jc100.out", "pilot.hwl.tt110.pv", "pilot.hwl.tt120.pv",
		"surmise.hotwater-loop.truth.element_temp", "surmise.hotwater-loop.truth.tank_temp",
		"surmise.hotwater-loop.truth.wall_temp", "surmise.hotwater-loop.truth.heat_loss"}
	deadline := time.Now().Add(10 * time.Second)
	for {
		mu.Lock()
		n := 0
		for _, s := range subjects {
			n += len(times[s])
		}
		mu.Unlock()
		if n == 7*samples {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("received %d messages, want %d", n, 7*samples)
		}
		time.Sleep(5 * time.Millisecond) // polling with a deadline
	}
	s.Unsubscribe()
	mu.Lock()
	defer mu.Unlock()
	if bad != 0 {
		t.Errorf("%d payloads the daemon refuses", bad)
	}
	for _, subj := range subjects {
		ts := times[subj]
		for k, at := range ts {
			// One sample a second at speed 1000: a millisecond apart.
			if want := start.Add(time.Duration(k) * time.Millisecond); !at.Equal(want) {
				t.Fatalf("%s: sample %d at %v, want %v", subj, k, at, want)
			}
		}
	}
	// The last sample, number 199, is due 199 ms after the start.
	if wall := time.Since(start); wall < (samples-1)*time.Millisecond {
		t.Errorf("published %d samples at speed 1000 in %v: faster than the clock", samples, wall)
	}
}

// TestPublishStops checks that Publish returns when its context is done.
func TestPublishStops(t *testing.T) {
	plant := demoPlant(t)
	sc, _ := Builtin("rehearsal", plant)
	sim, err := New(plant, sc, Options{Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	var sent int
	var conn countConn
	done := make(chan struct{})
	go func() {
		defer close(done)
		_, err = Publish(ctx, &conn, NewStream(sim), PublishOptions{Published: func(*Message, []byte, time.Time) {
			sent++
			if sent == 10 {
				cancel()
			}
		}})
	}()
	select {
	case <-done:
	case <-time.After(20 * time.Second):
		t.Fatal("Publish did not return after its context was cancelled")
	}
	if err != nil || sent != 10 {
		t.Errorf("err %v, %d sent; want nil, 10", err, sent)
	}
}

type countConn struct{ n int }

func (c *countConn) Publish(string, []byte) error { c.n++; return nil }

// TestWriteRecording checks that a recording written in plant time reads
// back without issues, in the stream's order, with the same bytes for the
// same seed.
func TestWriteRecording(t *testing.T) {
	plant := demoPlant(t)
	sc, _ := Builtin("rehearsal", plant)
	write := func() []byte {
		sim, err := New(plant, sc, Options{Seed: 8})
		if err != nil {
			t.Fatal(err)
		}
		var b bytes.Buffer
		clk := Clock{Start: time.Date(2026, 1, 5, 8, 0, 0, 0, time.UTC), Speed: 1}
		if _, err := WriteRecording(recording.NewWriter(&b), NewStream(sim), clk, 2*time.Minute); err != nil {
			t.Fatal(err)
		}
		return b.Bytes()
	}
	data := write()
	if !bytes.Equal(data, write()) {
		t.Error("two recordings with the same seed differ")
	}
	rec, err := recording.ReadJSONL(bytes.NewReader(data), "sim.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	if len(rec.Issues) != 0 {
		t.Errorf("issues: %v", rec.Issues)
	}
	counts := map[string]int{}
	for _, m := range rec.Messages {
		counts[m.Subject]++
		v, at, err := daemon.DecodeSample(m.Payload, m.Recv)
		if err != nil {
			t.Fatalf("line %d: %v", m.Line, err)
		}
		if at.After(m.Recv) || m.Recv.Sub(at) >= 400*time.Millisecond {
			t.Fatalf("line %d: received %v for a sample at %v (value %v): want a delay in [0, 400ms)", m.Line, m.Recv, at, v)
		}
	}
	// 120 samples; tank_outlet drops out for 10 and hx_outlet is slow (one
	// in 5) for 20: 110 and 104 readings.
	want := map[string]int{"pilot.hwl.jc100.out": 120, "pilot.hwl.tt110.pv": 110, "pilot.hwl.tt120.pv": 104,
		"surmise.hotwater-loop.truth.heat_loss": 120}
	for subj, n := range want {
		if counts[subj] != n {
			t.Errorf("%s: %d messages, want %d", subj, counts[subj], n)
		}
	}
}

// TestWriteCSV checks that the CSV reads back with the recording reader,
// blank cells where samples were dropped, and no issues.
func TestWriteCSV(t *testing.T) {
	plant := demoPlant(t)
	sc, _ := Builtin("rehearsal", plant)
	sim, err := New(plant, sc, Options{Seed: 8})
	if err != nil {
		t.Fatal(err)
	}
	var b bytes.Buffer
	clk := Clock{Start: time.Date(2026, 1, 5, 8, 0, 0, 0, time.UTC), Speed: 1}
	stats, err := WriteCSV(&b, sim, clk, 2*time.Minute)
	if err != nil {
		t.Fatal(err)
	}
	if stats.Samples != 120 {
		t.Errorf("%d rows, want 120", stats.Samples)
	}
	header, _, _ := strings.Cut(b.String(), "\n")
	if want := "time,heater_power,tank_outlet,hx_outlet,truth.element_temp,truth.tank_temp,truth.wall_temp,truth.heat_loss"; header != want {
		t.Errorf("header %q, want %q", header, want)
	}
	known := strings.Split(header, ",")[1:]
	rec, err := recording.ReadCSV(&b, "sim.csv", recording.CSVOptions{Known: known})
	if err != nil {
		t.Fatal(err)
	}
	if len(rec.Issues) != 0 {
		t.Errorf("issues: %v", rec.Issues)
	}
	counts := map[string]int{}
	for _, s := range rec.Samples {
		counts[s.Signal]++
	}
	if counts["tank_outlet"] != 110 || counts["hx_outlet"] != 104 || counts["heater_power"] != 120 {
		t.Errorf("counts %v, want 110 tank_outlet, 104 hx_outlet, 120 heater_power", counts)
	}
}
