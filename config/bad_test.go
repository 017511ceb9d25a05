package config

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
)

// want is one expected error of a bad file: its position, its field path,
// and a part of its message.
type want struct {
	line, column int
	field, msg   string
}

func (w want) String() string { return fmt.Sprintf("%d:%d: %s: %s", w.line, w.column, w.field, w.msg) }

var wantLine = regexp.MustCompile(`(?m)^# want: (\d+):(\d+): ([^:]*): (.+)$`)

// wants reads the "# want: line:column: field: message part" comments of a
// bad file; the field is empty for errors about the whole file.
func wants(t *testing.T, data []byte) []want {
	t.Helper()
	var ws []want
	for _, m := range wantLine.FindAllStringSubmatch(string(data), -1) {
		line, _ := strconv.Atoi(m[1])
		col, _ := strconv.Atoi(m[2])
		ws = append(ws, want{line, col, strings.TrimSpace(m[3]), m[4]})
	}
	return ws
}

// TestBadFiles parses every testdata/config/*.bad.yaml (plant-*.bad.yaml as
// plant files, gains-*.bad.yaml as gains files for double-integrator.yaml)
// and checks that it is refused with exactly the errors its "# want:" lines
// name: each wanted error is reported, and no other.
func TestBadFiles(t *testing.T) {
	plant, err := LoadPlant("../testdata/config/double-integrator.yaml")
	if err != nil {
		t.Fatal(err)
	}
	files, err := filepath.Glob("../testdata/config/*.bad.yaml")
	if err != nil {
		t.Fatal(err)
	}
	if len(files) < 30 {
		t.Fatalf("%d bad files, want at least 30", len(files))
	}
	for _, path := range files {
		name := filepath.Base(path)
		t.Run(strings.TrimSuffix(name, ".bad.yaml"), func(t *testing.T) {
			data, err := os.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			ws := wants(t, data)
			switch {
			case strings.HasPrefix(name, "plant-"):
				_, err = ParsePlant(name, data)
			case strings.HasPrefix(name, "gains-"):
				_, err = ParseGains(name, data, plant)
			default:
				t.Fatalf("%s: a bad file's name starts with plant- or gains-", name)
			}
			if err == nil {
				t.Fatalf("parsed without error; want %v", ws)
			}
			var list *ErrorList
			if !errors.As(err, &list) {
				t.Fatalf("error %T %v, want an *ErrorList", err, err)
			}
			if os.Getenv("SURMISE_DUMP_BAD") != "" {
				t.Logf("\n%v", err)
			}
			if len(ws) == 0 {
				t.Fatalf("no \"# want:\" lines; the errors are:\n%v", err)
			}
			got := list.Errors
			used := make([]bool, len(got))
			for _, w := range ws {
				found := false
				for i, e := range got {
					if !used[i] && e.Line == w.line && e.Column == w.column && e.Field == w.field && strings.Contains(e.Msg, w.msg) {
						used[i], found = true, true
						break
					}
				}
				if !found {
					t.Errorf("missing error %v", w)
				}
			}
			for i, e := range got {
				if !used[i] {
					t.Errorf("unexpected error %v", e)
				}
				if e.File != name {
					t.Errorf("error %v names file %q, want %q", e, e.File, name)
				}
			}
		})
	}
}
