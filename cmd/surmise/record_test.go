package main

import (
	"bufio"
	"bytes"
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"

	"surmise/daemon"
	"surmise/daemon/recording"
)

func recordServer(t *testing.T) (*server.Server, *nats.Conn) {
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
	return ns, nc
}

// TestRecordKilled runs `surmise record` as a process, publishes to it
// without pause and kills it (SIGKILL) mid-way: the file parses, every line
// but possibly a cut last one whole. A second recorder appends to the same
// file after removing such a cut line, and the file still parses.
func TestRecordKilled(t *testing.T) {
	if buildErr != nil {
		t.Fatal(buildErr)
	}
	ns, nc := recordServer(t)
	path := filepath.Join(t.TempDir(), "rec.jsonl")
	cmd := exec.Command(binary, "record", "--nats", ns.ClientURL(), "--subjects", "pilot.hwl.>", "--out", path)
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	defer cmd.Process.Kill()
	line, err := bufio.NewReader(stdout).ReadString('\n')
	if err != nil || !strings.HasPrefix(line, "recording pilot.hwl.> from") {
		t.Fatalf("first line %q, %v", line, err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	published := make(chan int)
	go func() {
		n := 0
		for ctx.Err() == nil {
			payload := []byte(`{"value": ` + strings.Repeat("1", 1+n%40) + `, "time": "` + time.Now().UTC().Format(time.RFC3339Nano) + `"}`)
			if nc.Publish("pilot.hwl.tt110.pv", payload) == nil {
				n++
			}
		}
		published <- n
	}()
	deadline := time.Now().Add(20 * time.Second)
	for {
		if st, err := os.Stat(path); err == nil && st.Size() > 200<<10 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("the recorder wrote less than 200 KiB in 20 s")
		}
		time.Sleep(10 * time.Millisecond) // polling with a deadline
	}
	if err := cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	cmd.Wait()
	cancel()
	n := <-published
	// A round trip, so that every message the client still buffered has
	// reached the server before the second recorder subscribes below: it
	// must record none of them.
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	rec, err := recording.ReadJSONL(bytes.NewReader(data), path)
	if err != nil {
		t.Fatalf("the killed recorder's file does not parse: %v", err)
	}
	cut := !bytes.HasSuffix(data, []byte("\n"))
	if len(rec.Issues) > 1 || (len(rec.Issues) == 1) != cut {
		t.Errorf("issues %v (file ends in a cut line: %v)", rec.Issues, cut)
	}
	if len(rec.Messages) == 0 || len(rec.Messages) > n {
		t.Errorf("%d messages in the file, %d published", len(rec.Messages), n)
	}
	t.Logf("%d messages published, %d recorded before the kill; cut last line: %v", n, len(rec.Messages), cut)

	// Append: a cut line (made by hand here, as a kill rarely lands inside
	// a write) is removed, and the new lines follow whole ones.
	f, err := os.OpenFile(path, os.O_APPEND|os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	if !cut {
		f.WriteString(`{"recv":"2026-01-05T08:00:00Z","subj`)
	}
	f.Close()
	out, errOut, code := cli(t, "record", "--nats", ns.ClientURL(), "--subjects", "pilot.hwl.>", "--out", path, "--for", "100ms")
	if code != 0 || !strings.Contains(errOut, "removed a cut last line") || !strings.Contains(out, "wrote 0 messages") {
		t.Fatalf("append: exit %d\n%s%s", code, out, errOut)
	}
	data, _ = os.ReadFile(path)
	rec2, err := recording.ReadJSONL(bytes.NewReader(data), path)
	if err != nil || len(rec2.Issues) != 0 || len(rec2.Messages) != len(rec.Messages) {
		t.Errorf("after the append: %v, issues %v, %d messages, want %d", err, rec2.Issues, len(rec2.Messages), len(rec.Messages))
	}
}

// TestOpenRecording checks the cut-line repair on files of every shape.
func TestOpenRecording(t *testing.T) {
	for _, tc := range []struct {
		in, want string
	}{
		{"", ""},
		{"a\n", "a\n"},
		{"a\nb", "a\n"},
		{"partial", ""},
		{"a\nb\n" + strings.Repeat("x", 200<<10), "a\nb\n"}, // the cut line is longer than a read block
	} {
		path := filepath.Join(t.TempDir(), "r.jsonl")
		if err := os.WriteFile(path, []byte(tc.in), 0o644); err != nil {
			t.Fatal(err)
		}
		f, cut, err := openRecording(path)
		if err != nil {
			t.Fatal(err)
		}
		f.WriteString("z\n")
		f.Close()
		got, _ := os.ReadFile(path)
		if string(got) != tc.want+"z\n" || cut != int64(len(tc.in)-len(tc.want)) {
			t.Errorf("%.20q: got %.20q (cut %d), want %.20q", tc.in, got, cut, tc.want+"z\n")
		}
	}
}

// TestRecordStreamVerb sets up a recording stream on the server, publishes
// to it while no recorder runs, and exports it.
func TestRecordStreamVerb(t *testing.T) {
	ns, nc := recordServer(t)
	out, errOut, code := cli(t, "record", "--nats", ns.ClientURL(), "--subjects", "pilot.hwl.>", "--stream", "PILOT", "--max-age", "24h")
	if code != 0 || !strings.Contains(out, "stream PILOT records pilot.hwl.> on") || !strings.Contains(out, "at most 24h0m0s") {
		t.Fatalf("exit %d\n%s%s", code, out, errOut)
	}
	for i := range 20 {
		if err := nc.Publish("pilot.hwl.tt110.pv", []byte{byte('0' + i%10)}); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "export.jsonl")
	deadline := time.Now().Add(10 * time.Second)
	for {
		os.Remove(path)
		out, errOut, code = cli(t, "record", "--nats", ns.ClientURL(), "--export", "--stream", "PILOT", "--out", path)
		if code == 0 && strings.Contains(out, "wrote 20 messages of stream PILOT") {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("exit %d\n%s%s", code, out, errOut)
		}
		time.Sleep(10 * time.Millisecond) // polling with a deadline: the stream stores asynchronously
	}
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rec, err := recording.ReadJSONL(f, path)
	if err != nil || len(rec.Messages) != 20 || string(rec.Messages[19].Payload) != "9" {
		t.Errorf("%v: %d messages", err, len(rec.Messages))
	}
}

func TestRecordUsage(t *testing.T) {
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"--out", "x"}, "--subjects is required"},
		{[]string{"--subjects", "a.>"}, "--out FILE or --stream NAME is required"},
		{[]string{"--subjects", "a.>,a.b", "--out", "x"}, "overlap"},
		{[]string{"--subjects", "a.>", "--stream", "S"}, "--stream needs --max-age or --max-bytes"},
		{[]string{"--subjects", "a.>", "--out", "x", "--max-age", "1h"}, "--max-age and --max-bytes limit a --stream"},
		{[]string{"--export", "--out", "x"}, "--export needs --stream and --out"},
		{[]string{"--subjects", "a.>", "--out", "x", "extra"}, "unexpected arguments"},
	} {
		out, errOut, code := cli(t, append([]string{"record"}, tc.args...)...)
		if code != 2 || !strings.Contains(out+errOut, tc.want) {
			t.Errorf("%q: exit %d, %s%s; want 2 and %q", tc.args, code, out, errOut, tc.want)
		}
	}
}
