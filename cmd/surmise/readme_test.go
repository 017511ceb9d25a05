package main

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"surmise/daemon"
)

// readmeCommand is a command shown in the README ("$ surmise …") and the
// output shown under it.
type readmeCommand struct {
	line  int
	args  []string
	shown []string
}

// readmeCommands returns the commands of the README section titled title,
// in order.
func readmeCommands(t *testing.T, title string) []readmeCommand {
	t.Helper()
	b, err := os.ReadFile(filepath.Join("..", "..", "README.md"))
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(string(b), "\n")
	var cmds []readmeCommand
	in, block := false, false
	for i, l := range lines {
		switch {
		case strings.HasPrefix(l, "## "):
			in = l == "## "+title
		case !in:
		case strings.HasPrefix(l, "```"):
			block = !block
		case block && strings.HasPrefix(l, "$ "):
			args, err := shellWords(strings.TrimPrefix(l, "$ "))
			if err != nil {
				t.Fatalf("README.md:%d: %v", i+1, err)
			}
			cmds = append(cmds, readmeCommand{line: i + 1, args: args})
		case block && len(cmds) > 0:
			cmds[len(cmds)-1].shown = append(cmds[len(cmds)-1].shown, l)
		}
	}
	return cmds
}

// shellWords splits a command line as a POSIX shell would for the simple
// lines of the README: words separated by spaces, with '…' and "…" quoting.
func shellWords(s string) ([]string, error) {
	var words []string
	var cur strings.Builder
	inWord := false
	for i := 0; i < len(s); i++ {
		switch c := s[i]; c {
		case ' ', '\t':
			if inWord {
				words = append(words, cur.String())
				cur.Reset()
				inWord = false
			}
		case '\'', '"':
			j := strings.IndexByte(s[i+1:], c)
			if j < 0 {
				return nil, fmt.Errorf("unbalanced %c in %q", c, s)
			}
			cur.WriteString(s[i+1 : i+1+j])
			i += j + 1
			inWord = true
		default:
			cur.WriteByte(c)
			inWord = true
		}
	}
	if inWord {
		words = append(words, cur.String())
	}
	return words, nil
}

// TestReadmeCommissioning runs every command of the README's Commissioning
// section as written, from a copy of the repository's cart directory: the
// designs (their output and the gains file they write are the ones shown
// and committed), `surmise run` and `surmise simulate` (in-process; the only
// change is that the daemon's NATS server and HTTP listener take free
// ports, and the other commands are pointed at that server), and each
// `surmise ctl` command, which must succeed, or be refused where the README
// shows a refusal.
func TestReadmeCommissioning(t *testing.T) {
	cmds := readmeCommands(t, "Commissioning")
	if len(cmds) < 8 {
		t.Fatalf("%d commands in the README's Commissioning section, want the designs, run, simulate and the ctl commands", len(cmds))
	}
	const dir = "daemon/testdata/commission"
	committed, err := os.ReadFile(filepath.Join("..", "..", dir, "cart.gains.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	plant, err := os.ReadFile(filepath.Join("..", "..", dir, "cart.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	root := t.TempDir()
	if err := os.MkdirAll(filepath.Join(root, dir), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(root, dir, "cart.yaml"), plant, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Chdir(root)
	// The daemon's local access files go here, where ctl finds them.
	t.Setenv("XDG_RUNTIME_DIR", t.TempDir())

	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	defer func() { cancel(); wg.Wait() }()
	background := func(name string, args []string) *syncBuffer {
		out := newSyncBuffer()
		wg.Add(1)
		go func() {
			defer wg.Done()
			if code := run(ctx, &env{stdout: out, stderr: out}, args); code != 0 {
				t.Errorf("surmise %s: exit %d\n%s", name, code, out.String())
			}
		}()
		return out
	}
	url := ""
	waitedForTicks := false
	for _, c := range cmds {
		where := "README.md:" + strconv.Itoa(c.line) + ": " + strings.Join(c.args, " ")
		if c.args[0] == "export" {
			k, v, _ := strings.Cut(c.args[1], "=")
			t.Setenv(k, v)
			continue
		}
		if c.args[0] != "surmise" || len(c.args) < 2 {
			t.Fatalf("%s: not a surmise command", where)
		}
		args := c.args[1:]
		switch args[0] {
		case "design":
			stdout, stderr, code := cli(t, args...)
			if code != 0 {
				t.Fatalf("%s: exit %d\n%s", where, code, stderr)
			}
			for _, s := range c.shown {
				if s != "…" && !strings.Contains(stdout, s+"\n") {
					t.Errorf("%s: the output lacks the README's line %q:\n%s", where, s, stdout)
				}
			}
		case "run":
			out := background("run", append([]string{"run", "--nats-port", "-1", "--listen", "127.0.0.1:0"}, args[1:]...))
			url = out.waitMatch(t, regexp.MustCompile(`(?m)^bus:  (nats://127\.0\.0\.1:\d+) \(embedded server\)$`), 20*time.Second)
		case "simulate":
			if url == "" {
				t.Fatalf("%s: before surmise run", where)
			}
			background("simulate", append([]string{"simulate", "--nats", url}, args[1:]...))
		case "ctl":
			if url == "" {
				t.Fatalf("%s: before surmise run", where)
			}
			if !waitedForTicks {
				waitForLanes(t, url, 20)
				waitedForTicks = true
			}
			// As the README writes it: ctl finds the daemon by itself.
			ctlArgs := append([]string{"ctl"}, args[1:]...)
			stdout, stderr, code := cli(t, ctlArgs...)
			shown := strings.Join(c.shown, "\n")
			want := 0
			if strings.Contains(shown, "refused") {
				want = 1
				// The refusal's reason, up to the figures that vary.
				prefix, _, _ := strings.Cut(shown, " ago")
				prefix, _, _ = strings.Cut(prefix, "changed")
				if !strings.Contains(stderr, strings.TrimSpace(prefix)) {
					t.Errorf("%s: stderr %q does not start like the README's %q", where, stderr, prefix)
				}
			}
			t.Logf("%s: exit %d\n%s%s", where, code, stdout, stderr)
			if code != want {
				t.Errorf("%s: exit %d, want %d\n%s%s", where, code, want, stdout, stderr)
			}
		default:
			t.Fatalf("%s: the test does not know how to run it", where)
		}
	}
	written, err := os.ReadFile(filepath.Join(dir, "cart.gains.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if string(written) != string(committed) {
		t.Errorf("the README's design commands write a gains file that differs from the committed %s/cart.gains.yaml:\n%s", dir, written)
	}
}

// waitForLanes waits until the cart's active and shadow lanes have run at
// least n ticks.
func waitForLanes(t *testing.T, url string, n uint64) {
	t.Helper()
	deadline := time.Now().Add(30 * time.Second)
	for {
		out, _, code := cli(t, "ctl", "--json", "cart", "status") // found by its local access files
		var st daemon.StatusReply
		if code == 0 && json.Unmarshal([]byte(out), &st) == nil && st.Tick != nil && st.Shadow != nil && st.Tick.Seq >= n {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("the cart's lanes did not run %d ticks within 30 s: %s", n, out)
		}
		time.Sleep(50 * time.Millisecond) // polling with a deadline
	}
}
