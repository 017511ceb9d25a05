package config

import (
	"os"
	"regexp"
	"strings"
	"testing"
)

// docExamples returns the indented example blocks of doc.go, comment markers
// removed.
func docExamples(t *testing.T) []string {
	t.Helper()
	src, err := os.ReadFile("doc.go")
	if err != nil {
		t.Fatal(err)
	}
	var blocks []string
	var cur []string
	for _, line := range strings.Split(string(src), "\n") {
		if strings.HasPrefix(line, "//\t") {
			cur = append(cur, strings.TrimPrefix(line, "//\t"))
			continue
		}
		if len(cur) > 0 {
			blocks = append(blocks, strings.Join(cur, "\n")+"\n")
			cur = nil
		}
	}
	return blocks
}

// TestDocExamples parses the annotated plant and gains files of the package
// documentation, so that the documentation cannot drift from the parser.
func TestDocExamples(t *testing.T) {
	var plantDoc, gainsDoc string
	for _, b := range docExamples(t) {
		switch {
		case strings.HasPrefix(b, "name: hotwater-loop"):
			plantDoc = b
		case strings.Contains(b, "fingerprint: sha256:"):
			gainsDoc = b
		}
	}
	if plantDoc == "" || gainsDoc == "" {
		t.Fatal("doc.go has no plant or no gains example")
	}
	p, err := ParsePlant("doc.go", []byte(plantDoc))
	if err != nil {
		t.Fatalf("the plant example of doc.go: %v", err)
	}
	// The shortened example is the demo plant: the same discrete model.
	if got, want := Fingerprint(p.Model), Fingerprint(mustLoad(t, hotwaterFile).Model); got != want {
		t.Errorf("doc.go plant fingerprint %s, hotwater-loop.yaml %s", got, want)
	}
	cart := mustLoad(t, cartFile)
	gainsDoc = regexp.MustCompile(`sha256:\S+`).ReplaceAllString(gainsDoc, Fingerprint(cart.Model))
	g, err := ParseGains("doc.go", []byte(gainsDoc), cart)
	if err != nil {
		t.Fatalf("the gains example of doc.go: %v", err)
	}
	if g.Active != "poles-half" || len(g.Sets) != 2 {
		t.Errorf("doc.go gains: active %q, %d sets", g.Active, len(g.Sets))
	}
}
