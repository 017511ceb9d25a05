package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"surmise/daemon"
)

// TestFleetVerbs puts, lists, shows and removes plants of a fleet on an
// embedded server: a plant that cannot run is refused as check refuses it,
// and stored nothing; the history records each change.
func TestFleetVerbs(t *testing.T) {
	ns, err := daemon.StartEmbedded(daemon.EmbeddedOptions{Port: -1, StoreDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { ns.Shutdown(); ns.WaitForShutdown() })
	url := ns.ClientURL()
	fleet := func(args ...string) (string, string, int) {
		t.Helper()
		return cli(t, append([]string{"fleet", args[0], "--fleet", "site", "--nats", url}, args[1:]...)...)
	}

	out, errOut, code := fleet("put", plantPath("hotwater-loop.yaml"))
	if code != 0 || !strings.Contains(out, "put hotwater-loop in fleet site: plant revision 2, gains revision 1") {
		t.Fatalf("put: exit %d, %q %q", code, out, errOut)
	}
	// The same files again: nothing changes.
	if out, _, code := fleet("put", plantPath("hotwater-loop.yaml")); code != 0 || !strings.Contains(out, "plant revision 2, gains revision 1") {
		t.Errorf("put again: exit %d, %q", code, out)
	}
	// A plant whose model cannot be estimated is refused, with check's report.
	_, errOut, code = fleet("put", plantPath("unobservable.yaml"))
	if code != 1 || !strings.Contains(errOut, "refused") {
		t.Errorf("put of an unobservable plant: exit %d, stderr %q", code, errOut)
	}

	out, _, code = fleet("ls")
	lines := strings.Split(strings.TrimSpace(out), "\n")
	if code != 0 || len(lines) != 2 || !strings.HasPrefix(lines[1], "hotwater-loop") || !strings.Contains(lines[1], "(none)") {
		t.Errorf("ls: exit %d:\n%s", code, out)
	}
	want, err := os.ReadFile(plantPath("hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if out, _, code := fleet("get", "hotwater-loop"); code != 0 || out != string(want) {
		t.Errorf("get: exit %d, not the plant file put", code)
	}
	wantGains, err := os.ReadFile(filepath.Join(filepath.Dir(plantPath("hotwater-loop.yaml")), "hotwater-loop.gains.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	if out, _, code := fleet("get", "hotwater-loop", "--gains"); code != 0 || out != string(wantGains) {
		t.Errorf("get --gains: exit %d, not the gains file put", code)
	}
	if out, _, code := fleet("rm", "hotwater-loop"); code != 0 || !strings.Contains(out, "removed hotwater-loop") {
		t.Errorf("rm: exit %d, %q", code, out)
	}
	out, _, code = fleet("get", "hotwater-loop", "--history")
	if code != 0 || strings.Count(out, "\tput\t") != 2 || strings.Count(out, "\tdelete\t") != 2 {
		t.Errorf("history: exit %d:\n%s", code, out)
	}
	if _, _, code := fleet("get", "hotwater-loop"); code != 1 {
		t.Errorf("get after rm: exit %d, want 1", code)
	}
	for _, args := range [][]string{{"fleet", "ls"}, {"fleet", "nope", "--fleet", "site"}, {"fleet", "put", "--fleet", "Bad Name", "x.yaml"}, {"fleet", "get", "--fleet", "site"}} {
		if _, _, code := cli(t, args...); code != 2 {
			t.Errorf("%v: exit %d, want 2", args, code)
		}
	}
}
