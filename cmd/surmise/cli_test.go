package main

import (
	"bytes"
	"context"
	"errors"
	"flag"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strings"
	"testing"
)

// update regenerates the golden files under testdata/golden:
//
//	go test ./cmd/surmise -run 'Golden' -update
var update = flag.Bool("update", false, "rewrite the golden files in testdata/golden")

// binary is the surmise binary TestMain builds for the tests that run it as a
// separate process (exit codes); "" when the build failed, and buildErr says why.
var binary, buildErr = "", error(nil)

func TestMain(m *testing.M) {
	flag.Parse()
	dir, err := os.MkdirTemp("", "surmise-cmd-test-")
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	binary, buildErr = buildBinary(dir)
	code := m.Run()
	os.RemoveAll(dir)
	os.Exit(code)
}

// buildBinary runs `go build -o DIR/surmise .` with the go command of the
// toolchain running the tests.
func buildBinary(dir string) (string, error) {
	goCmd := filepath.Join(runtime.GOROOT(), "bin", "go")
	if _, err := os.Stat(goCmd); err != nil {
		if goCmd, err = exec.LookPath("go"); err != nil {
			return "", errors.New("no go command to build the binary with")
		}
	}
	out := filepath.Join(dir, "surmise")
	cmd := exec.Command(goCmd, "build", "-o", out, ".")
	if msg, err := cmd.CombinedOutput(); err != nil {
		return "", fmt.Errorf("go build: %v\n%s", err, msg)
	}
	return out, nil
}

// cli runs a command line in-process, as main would, and returns what it
// printed and its exit status.
func cli(t *testing.T, args ...string) (stdout, stderr string, code int) {
	t.Helper()
	var o, e bytes.Buffer
	code = run(context.Background(), &env{stdout: &o, stderr: &e}, args)
	return o.String(), e.String(), code
}

// golden compares got with testdata/golden/name, or rewrites it with -update.
// The golden files are regression snapshots written by the code under test:
// they catch an unintended change of the output, not a wrong number. The
// numbers are checked against outside values elsewhere (check_ref_test.go,
// and the closed forms in the tests that call golden).
func golden(t *testing.T, name, got string) {
	t.Helper()
	path := filepath.Join("testdata", "golden", name)
	if *update {
		if err := os.WriteFile(path, []byte(got), 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (run the test with -update to create it)", err)
	}
	if got == string(want) {
		return
	}
	gl, wl := strings.Split(got, "\n"), strings.Split(string(want), "\n")
	for i := 0; i < max(len(gl), len(wl)); i++ {
		var g, w string
		if i < len(gl) {
			g = gl[i]
		}
		if i < len(wl) {
			w = wl[i]
		}
		if g != w {
			t.Fatalf("%s differs from the golden file at line %d:\n got: %q\nwant: %q\n(rerun with -update if the change is intended)", path, i+1, g, w)
		}
	}
}

// plantPath is a plant file of the repository's testdata/plants or, for
// names starting with "cmd:", of this package's testdata/plants.
func plantPath(name string) string {
	if rest, ok := strings.CutPrefix(name, "cmd:"); ok {
		return filepath.Join("testdata", "plants", rest)
	}
	return filepath.Join("..", "..", "testdata", "plants", name)
}

// TestExitCodes runs the real binary: 0 for the demo plant, 1 for a plant
// no estimator can run on, 2 for command-line mistakes.
func TestExitCodes(t *testing.T) {
	if buildErr != nil {
		t.Fatal(buildErr)
	}
	out := filepath.Join(t.TempDir(), "g.yaml")
	for _, tc := range []struct {
		name string
		args []string
		want int
	}{
		{"check the demo plant", []string{"check", plantPath("hotwater-loop.yaml")}, 0},
		{"check the demo plant as JSON", []string{"check", plantPath("hotwater-loop.yaml"), "--json"}, 0},
		{"check an undetectable plant", []string{"check", plantPath("unobservable.yaml")}, 1},
		{"check a missing file", []string{"check", "no-such-plant.yaml"}, 1},
		{"check with an unknown flag", []string{"check", "--verbose", plantPath("hotwater-loop.yaml")}, 2},
		{"check with three files", []string{"check", "a.yaml", "b.yaml", "c.yaml"}, 2},
		{"check help", []string{"check", "-h"}, 0},
		{"design the demo plant", []string{"design", "-o", out, plantPath("hotwater-loop.yaml")}, 0},
		{"design an undetectable plant", []string{"design", "-o", out, plantPath("unobservable.yaml")}, 1},
		{"design with a bad form", []string{"design", "--form", "sideways", plantPath("hotwater-loop.yaml")}, 2},
		{"design with a bad --faster", []string{"design", "--faster", "-2", plantPath("hotwater-loop.yaml")}, 2},
		{"no command", nil, 2},
		{"unknown command", []string{"chek"}, 2},
		{"version", []string{"version"}, 0},
		{"version as a flag", []string{"--version"}, 0},
		{"version with an unknown flag", []string{"version", "--x"}, 2},
		{"version with an argument", []string{"version", "extra"}, 2},
	} {
		t.Run(tc.name, func(t *testing.T) {
			cmd := exec.Command(binary, tc.args...)
			var stderr bytes.Buffer
			cmd.Stderr = &stderr
			err := cmd.Run()
			code := 0
			var ee *exec.ExitError
			if errors.As(err, &ee) {
				code = ee.ExitCode()
			} else if err != nil {
				t.Fatal(err)
			}
			if code != tc.want {
				t.Errorf("surmise %s: exit status %d, want %d; stderr:\n%s", strings.Join(tc.args, " "), code, tc.want, stderr.String())
			}
		})
	}
}

func TestParseArgs(t *testing.T) {
	for _, tc := range []struct {
		args     []string
		wantPos  []string
		wantJSON bool
	}{
		{[]string{"p.yaml"}, []string{"p.yaml"}, false},
		{[]string{"--json", "p.yaml"}, []string{"p.yaml"}, true},
		{[]string{"p.yaml", "--json"}, []string{"p.yaml"}, true},
		{[]string{"p.yaml", "-json", "g.yaml"}, []string{"p.yaml", "g.yaml"}, true},
		{[]string{"p.yaml", "--", "--json"}, []string{"p.yaml", "--json"}, false},
		{[]string{"-"}, []string{"-"}, false},
		{nil, nil, false},
	} {
		var e bytes.Buffer
		fs := newFlags(&env{stdout: &e, stderr: &e}, "t", "")
		j := fs.Bool("json", false, "")
		pos, err := parseArgs(fs, tc.args)
		if err != nil {
			t.Errorf("parseArgs(%q): %v", tc.args, err)
			continue
		}
		if strings.Join(pos, "|") != strings.Join(tc.wantPos, "|") || *j != tc.wantJSON {
			t.Errorf("parseArgs(%q) = %q, json %v; want %q, json %v", tc.args, pos, *j, tc.wantPos, tc.wantJSON)
		}
	}
}

// TestHelp: help goes to standard output (so `surmise run -h | less` works),
// `surmise help VERB` is `surmise VERB -h`, and every flag's placeholder is
// an upper-case word, so that it cannot be read as a default.
func TestHelp(t *testing.T) {
	for _, v := range verbs() {
		t.Run(v.name, func(t *testing.T) {
			out, errOut, code := cli(t, v.name, "-h")
			if code != 0 || errOut != "" || !strings.HasPrefix(out, "Usage: surmise "+v.name) {
				t.Fatalf("surmise %s -h: status %d, stdout %q, stderr %q; want the usage on stdout", v.name, code, firstLine(out), errOut)
			}
			if out2, _, code := cli(t, "help", v.name); code != 0 || out2 != out {
				t.Errorf("surmise help %s differs from surmise %s -h (status %d)", v.name, v.name, code)
			}
			if strings.Contains(out, "Flags:") && !strings.Contains(out, "\n  -") {
				t.Errorf("an empty Flags: section:\n%s", out)
			}
			for _, line := range strings.Split(out, "\n") {
				if !strings.HasPrefix(line, "  -") {
					continue
				}
				f := strings.Fields(line)
				if len(f) == 2 && strings.ToUpper(f[1]) != f[1] {
					t.Errorf("flag line %q: the placeholder %q is not an upper-case word", line, f[1])
				}
			}
		})
	}
	if out, _, code := cli(t, "version", "-h"); code != 0 || strings.Contains(out, "Flags:") {
		t.Errorf("surmise version -h: status %d, %q; want no Flags: section", code, out)
	}
	if out, _, code := cli(t, "help"); code != 0 || !strings.Contains(out, "simulate") {
		t.Errorf("surmise help: status %d, %q", code, out)
	}
}

// TestUsageErrors: a command-line mistake is a short message on standard
// error, with the flag or command probably meant, not the whole usage.
func TestUsageErrors(t *testing.T) {
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"replay", "--dat", "x"}, "surmise replay: unknown flag --dat (did you mean --data?)"},
		{[]string{"design", "--metod", "kalman", "p.yaml"}, "surmise design: unknown flag --metod (did you mean --method?)"},
		{[]string{"check", "--verbose", "p.yaml"}, "surmise check: unknown flag --verbose\n"},
		{[]string{"ctl", "--timeout"}, "surmise ctl: flag --timeout needs a value"},
		{[]string{"demo", "--speed", "fast"}, `surmise demo: invalid value "fast" for --speed`},
		{[]string{"chek"}, `surmise: unknown command "chek" (did you mean "check"?)`},
		{[]string{"check"}, "surmise check: want a plant file"},
	} {
		out, errOut, code := cli(t, tc.args...)
		if code != 2 || out != "" || !strings.Contains(errOut, tc.want) {
			t.Errorf("surmise %q: status %d, stdout %q, stderr %q; want status 2 and %q", tc.args, code, out, errOut, tc.want)
		}
		if n := strings.Count(errOut, "\n"); n > 3 {
			t.Errorf("surmise %q: %d lines on stderr, want a short message:\n%s", tc.args, n, errOut)
		}
	}
}

// TestCheckMissingFile: a file that cannot be read is reported in the
// command's name, with status 1.
func TestCheckMissingFile(t *testing.T) {
	_, errOut, code := cli(t, "check", "no-such-plant.yaml")
	if code != 1 || !strings.HasPrefix(errOut, "surmise check: cannot read the plant file: open no-such-plant.yaml:") {
		t.Errorf("check of a missing file: status %d, %q", code, errOut)
	}
}

func firstLine(s string) string {
	line, _, _ := strings.Cut(s, "\n")
	return line
}

// TestFnumNearOne: "1" is printed only for 1; an eigenvalue a hair below it
// shows how far below.
func TestFnumNearOne(t *testing.T) {
	for _, tc := range []struct {
		x    float64
		want string
	}{
		{1, "1"}, {-1, "-1"}, {0.99999978, "0.99999978"}, {1.0000004, "1.0000004"},
		{-0.9999999, "-0.9999999"}, {0.998564, "0.998564"}, {0.5, "0.5"},
	} {
		if got := fnum(tc.x); got != tc.want {
			t.Errorf("fnum(%v) = %q, want %q", tc.x, got, tc.want)
		}
	}
}
