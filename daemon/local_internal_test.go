package daemon

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func TestReadUserFile(t *testing.T) {
	dir := t.TempDir()
	for _, c := range []struct {
		name, text string
		mode       os.FileMode
		user, pw   string
		err        string
	}{
		{"plain", "surmise-local:abc\n", 0o600, "surmise-local", "abc", ""},
		{"colon in password", " ann:a:b:c \n", 0o600, "ann", "a:b:c", ""},
		{"readable by others", "ann:pw\n", 0o644, "", "", "lets other users read"},
		{"no colon", "annpw\n", 0o600, "", "", "line 1: want USER:PASSWORD"},
		{"empty password", "ann:\n", 0o600, "", "", "line 1: want USER:PASSWORD"},
		{"empty", "", 0o600, "", "", "empty"},
	} {
		path := filepath.Join(dir, strings.ReplaceAll(c.name, " ", "-"))
		if err := os.WriteFile(path, []byte(c.text), c.mode); err != nil {
			t.Fatal(err)
		}
		os.Chmod(path, c.mode)
		u, p, err := ReadUserFile(path)
		switch {
		case c.err == "" && (err != nil || u != c.user || p != c.pw):
			t.Errorf("%s: %q %q %v, want %q %q", c.name, u, p, err, c.user, c.pw)
		case c.err != "" && (err == nil || !strings.Contains(err.Error(), c.err) || !strings.Contains(err.Error(), path)):
			t.Errorf("%s: error %v, want one naming %s and saying %q", c.name, err, path, c.err)
		}
	}
}

// FuzzParseUserLine: any line parses to a non-empty user without a colon
// and a non-empty password, or is refused.
func FuzzParseUserLine(f *testing.F) {
	for _, s := range []string{"surmise-local:abc", "a:b:c", ":x", "x:", "", " u:p \n"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, line string) {
		u, p, err := parseUserLine(line)
		if err != nil {
			return
		}
		if u == "" || p == "" || strings.Contains(u, ":") {
			t.Fatalf("%q → user %q password %q", line, u, p)
		}
	})
}
