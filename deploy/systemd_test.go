package deploy

import (
	"bufio"
	"bytes"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

const (
	systemdInstall = "Debian: apt-get install systemd"
	unitPath       = "systemd/surmise.service"
	// unitBinary is where the unit expects the daemon.
	unitBinary = "/usr/local/bin/surmise"
)

// daemonFlags are the flags of `surmise run` that take a value (cmd/surmise/run.go).
var daemonFlags = []string{"--nats", "--creds", "--nkey", "--tls-ca", "--tls-cert", "--tls-key", "--listen", "--log-format", "--state-dir", "--fleet", "--metrics", "--instance"}

// unitWithStub copies the unit into a temporary directory with ExecStart pointing at an
// executable stub script, and returns the copy's path. systemd-analyze verify refuses a unit
// whose ExecStart binary does not exist, and the daemon is not built here (cmd/surmise has no
// `run` verb yet, and the unit names an installed path); the stub stands in for it, so the
// unit's own keys, values, specifiers and sandboxing options are what gets verified.
func unitWithStub(t *testing.T, unit string) string {
	t.Helper()
	dir := t.TempDir()
	stub := filepath.Join(dir, "surmise")
	if err := os.WriteFile(stub, []byte("#!/bin/sh\nexit 0\n"), 0o755); err != nil {
		t.Fatal(err)
	}
	if strings.Count(unit, unitBinary) != 1 {
		t.Fatalf("%s: want %s exactly once (in ExecStart), found %d", unitPath, unitBinary, strings.Count(unit, unitBinary))
	}
	path := filepath.Join(dir, "surmise.service")
	if err := os.WriteFile(path, []byte(strings.Replace(unit, unitBinary, stub, 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

// verifyUnit runs systemd-analyze verify and returns its complaints about the unit: it reports
// unknown keys and unparsable values on stderr but still exits 0, so every output line that
// names the unit counts; lines about other units of the host are only logged.
func verifyUnit(t *testing.T, analyze, path string) []string {
	t.Helper()
	out, err := runTool(t, nil, analyze, "verify", path)
	var complaints []string
	for _, line := range strings.Split(strings.TrimSpace(out), "\n") {
		switch {
		case line == "":
		case strings.Contains(line, filepath.Base(path)):
			complaints = append(complaints, line)
		default:
			t.Logf("systemd-analyze verify (about something else): %s", line)
		}
	}
	if err != nil && len(complaints) == 0 {
		complaints = append(complaints, "exit status: "+err.Error()+"\n"+out)
	}
	return complaints
}

func TestSystemdAnalyzeVerify(t *testing.T) {
	analyze := requireTool(t, "systemd-analyze", systemdInstall)
	unit := string(readFile(t, unitPath))
	if c := verifyUnit(t, analyze, unitWithStub(t, unit)); len(c) > 0 {
		t.Fatalf("systemd-analyze verify %s:\n%s", unitPath, strings.Join(c, "\n"))
	}

	// The same check on broken copies must complain, or it proves nothing.
	broken := []struct{ name, old, new string }{
		{"misspelt key", "WatchdogSec=30s", "WatchdogSecs=30s"},
		{"bad value", "\nProtectSystem=strict\n", "\nProtectSystem=stricter\n"},
		{"unknown system call group", "SystemCallFilter=@system-service", "SystemCallFilter=@system-servic"},
	}
	for _, b := range broken {
		if strings.Count(unit, b.old) != 1 {
			t.Fatalf("%s: %q occurs %d times, want once", b.name, b.old, strings.Count(unit, b.old))
		}
		if c := verifyUnit(t, analyze, unitWithStub(t, strings.Replace(unit, b.old, b.new, 1))); len(c) == 0 {
			t.Errorf("systemd-analyze verify found nothing wrong with a %s (%s)", b.name, b.new)
		}
	}
}

// TestSystemdAnalyzeSecurity scores the unit's sandboxing offline: systemd rates exposure from
// 0 to 10 and calls below 2 "OK" (the threshold is given in tenths).
func TestSystemdAnalyzeSecurity(t *testing.T) {
	analyze := requireTool(t, "systemd-analyze", systemdInstall)
	path := unitWithStub(t, string(readFile(t, unitPath)))
	out, err := runTool(t, nil, analyze, "security", "--offline=yes", "--threshold=20", path)
	if err != nil {
		t.Fatalf("systemd-analyze security: exposure above 2.0 or an error: %v\n%s", err, out)
	}
	t.Log(lastLine(out))
}

func lastLine(s string) string {
	lines := strings.Split(strings.TrimSpace(s), "\n")
	return lines[len(lines)-1]
}

// unitFile is a parsed systemd unit: section → key → values in order (keys may repeat).
type unitFile map[string]map[string][]string

// parseUnit reads systemd's INI dialect: [Section], Key=Value, comments with # or ;, and
// backslash continuation lines.
func parseUnit(data []byte) (unitFile, error) {
	u := unitFile{}
	section := ""
	sc := bufio.NewScanner(bytes.NewReader(data))
	var pending string
	for sc.Scan() {
		line := strings.TrimSpace(sc.Text())
		if pending == "" && (line == "" || strings.HasPrefix(line, "#") || strings.HasPrefix(line, ";")) {
			continue
		}
		if cont, ok := strings.CutSuffix(line, "\\"); ok {
			pending += cont + " "
			continue
		}
		line, pending = pending+line, ""
		if strings.HasPrefix(line, "[") && strings.HasSuffix(line, "]") {
			section = line[1 : len(line)-1]
			if u[section] == nil {
				u[section] = map[string][]string{}
			}
			continue
		}
		k, v, ok := strings.Cut(line, "=")
		if !ok || section == "" {
			return nil, &unitError{line}
		}
		u[section][strings.TrimSpace(k)] = append(u[section][strings.TrimSpace(k)], strings.TrimSpace(v))
	}
	return u, sc.Err()
}

type unitError struct{ line string }

func (e *unitError) Error() string { return "not a Key=Value line in a section: " + e.line }

// TestSystemdUnitContents checks what the kit promises of the unit, independently of systemd:
// notify with a watchdog, reload by SIGHUP, the state and configuration directories, the
// sandboxing, and an ExecStart that uses only the daemon's flags and files the service may read.
func TestSystemdUnitContents(t *testing.T) {
	u, err := parseUnit(readFile(t, unitPath))
	if err != nil {
		t.Fatalf("%s: %v", unitPath, err)
	}
	svc := u["Service"]
	// What the kit promises (deploy/README.md); the values systemd-analyze cannot judge.
	want := map[string]string{
		"Type":                    "notify",
		"NotifyAccess":            "main",
		"ExecReload":              "/bin/kill -HUP $MAINPID",
		"Restart":                 "on-failure",
		"StateDirectory":          "surmise",
		"ConfigurationDirectory":  "surmise",
		"DynamicUser":             "yes",
		"ProtectSystem":           "strict",
		"ProtectHome":             "yes",
		"NoNewPrivileges":         "yes",
		"PrivateTmp":              "yes",
		"MemoryDenyWriteExecute":  "yes",
		"CapabilityBoundingSet":   "",
		"AmbientCapabilities":     "",
		"RestrictAddressFamilies": "AF_INET AF_INET6 AF_UNIX",
		"SystemCallFilter":        "@system-service",
	}
	for k, v := range want {
		got := svc[k]
		if len(got) == 0 {
			t.Errorf("[Service] %s is missing, want %q", k, v)
			continue
		}
		if got[0] != v {
			t.Errorf("[Service] %s=%q, want %q", k, got[0], v)
		}
	}
	if w := svc["WatchdogSec"]; len(w) != 1 || w[0] == "0" || w[0] == "" {
		t.Errorf("[Service] WatchdogSec=%q: want a watchdog interval", w)
	}
	// GOMEMLIMIT must lie below MemoryMax, or the kernel kills the process before the garbage
	// collector reacts (systemd's M and Go's MiB are both 2^20 bytes).
	var limit, max int
	if _, err := fmt.Sscanf(strings.Join(svc["Environment"], " "), "GOMEMLIMIT=%dMiB", &limit); err != nil {
		t.Errorf("[Service] Environment=%q: want GOMEMLIMIT=<n>MiB first: %v", svc["Environment"], err)
	}
	if _, err := fmt.Sscanf(strings.Join(svc["MemoryMax"], " "), "%dM", &max); err != nil {
		t.Errorf("[Service] MemoryMax=%q: want <n>M: %v", svc["MemoryMax"], err)
	}
	if limit <= 0 || limit >= max {
		t.Errorf("GOMEMLIMIT=%dMiB, MemoryMax=%dM: want 0 < GOMEMLIMIT < MemoryMax", limit, max)
	}
	if got := svc["SystemCallFilter"]; !slices.Contains(got, "~@privileged") {
		t.Errorf("[Service] SystemCallFilter=%q: want @privileged denied as well", got)
	}

	// ExecStart: the binary, `run`, known flags each with a value, then plant files.
	exec := svc["ExecStart"]
	if len(exec) != 1 {
		t.Fatalf("[Service] ExecStart given %d times, want once", len(exec))
	}
	args := strings.Fields(exec[0])
	if len(args) < 3 || args[0] != unitBinary || args[1] != "run" {
		t.Fatalf("ExecStart=%q: want %s run [flags] PLANT.yaml…", exec[0], unitBinary)
	}
	creds := map[string]bool{}
	for _, lc := range svc["LoadCredential"] {
		name, _, _ := strings.Cut(lc, ":")
		creds[name] = true
	}
	var plants []string
	for i := 2; i < len(args); i++ {
		a := args[i]
		if !strings.HasPrefix(a, "-") {
			plants = append(plants, args[i:]...)
			break
		}
		if !slices.Contains(daemonFlags, a) {
			t.Errorf("ExecStart: %s is not a flag of surmise run %v", a, daemonFlags)
			continue
		}
		if i+1 >= len(args) || strings.HasPrefix(args[i+1], "-") {
			t.Errorf("ExecStart: %s has no value", a)
			continue
		}
		i++
		v := args[i]
		switch a {
		case "--log-format":
			if v != "text" && v != "json" {
				t.Errorf("ExecStart: --log-format %s, want text or json", v)
			}
		case "--state-dir":
			if v != "%S/surmise" {
				t.Errorf("ExecStart: --state-dir %s, want the StateDirectory %%S/surmise", v)
			}
		}
		// A credential the daemon reads must be one that LoadCredential= provides.
		if name, ok := strings.CutPrefix(v, "%d/"); ok && !creds[name] {
			t.Errorf("ExecStart: %s %s names a credential that no LoadCredential= provides", a, v)
		}
	}
	if len(plants) == 0 {
		t.Errorf("ExecStart=%q: no plant file after the flags", exec[0])
	}
	for _, p := range plants {
		if !strings.HasPrefix(p, "/etc/surmise/") || !strings.HasSuffix(p, ".yaml") {
			t.Errorf("ExecStart: plant file %s, want a .yaml file in the ConfigurationDirectory /etc/surmise", p)
		}
	}
	if u["Install"]["WantedBy"] == nil {
		t.Errorf("[Install] WantedBy= is missing: systemctl enable would do nothing")
	}
}

func TestParseUnit(t *testing.T) {
	u, err := parseUnit([]byte("# c\n[Service]\nExecStart=/bin/a \\\n  --x 1 \\\n  f.yaml\nA=\nA=2\n; c\n"))
	if err != nil {
		t.Fatal(err)
	}
	if got := u["Service"]["ExecStart"]; len(got) != 1 || strings.Join(strings.Fields(got[0]), " ") != "/bin/a --x 1 f.yaml" {
		t.Errorf("ExecStart = %q", got)
	}
	if got := u["Service"]["A"]; !slices.Equal(got, []string{"", "2"}) {
		t.Errorf("A = %q, want [\"\" \"2\"]", got)
	}
	if _, err := parseUnit([]byte("A=1\n")); err == nil {
		t.Error("a key outside any section was accepted")
	}
}
