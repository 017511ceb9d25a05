package config

import (
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// addSeeds adds every file matching the patterns to the fuzz corpus.
func addSeeds(f *testing.F, patterns ...string) {
	f.Helper()
	n := 0
	for _, p := range patterns {
		files, err := filepath.Glob(p)
		if err != nil {
			f.Fatal(err)
		}
		for _, file := range files {
			data, err := os.ReadFile(file)
			if err != nil {
				f.Fatal(err)
			}
			f.Add(data)
			n++
		}
	}
	if n == 0 {
		f.Fatal("no seed files")
	}
}

// checkRefusal checks the shape of a parse error: an *ErrorList with at
// least one error, each naming the file.
func checkRefusal(t *testing.T, err error, file string) {
	var list *ErrorList
	if !errors.As(err, &list) || len(list.Errors) == 0 {
		t.Fatalf("error %T %v, want a non-empty *ErrorList", err, err)
	}
	for _, e := range list.Errors {
		if e.File != file || e.Msg == "" {
			t.Fatalf("malformed error %+v", e)
		}
	}
}

func FuzzParsePlant(f *testing.F) {
	addSeeds(f, "../testdata/config/*.yaml", "../testdata/plants/*.yaml")
	f.Fuzz(func(t *testing.T, data []byte) {
		p, err := ParsePlant("fuzz.yaml", data)
		if err != nil {
			checkRefusal(t, err, "fuzz.yaml")
			return
		}
		if err := p.Model.Validate(); err != nil {
			t.Fatalf("accepted an invalid model: %v", err)
		}
		n, m, o := p.Model.Dims()
		if len(p.Inputs) != m || len(p.Outputs) != o || len(p.Initial) != n || p.Model.Q == nil || p.Model.R == nil {
			t.Fatalf("inconsistent plant %+v", p)
		}
		if fp := Fingerprint(p.Model); !strings.HasPrefix(fp, "sha256:") {
			t.Fatalf("fingerprint %q", fp)
		}
	})
}

func FuzzParseGains(f *testing.F) {
	plant, err := LoadPlant(cartFile)
	if err != nil {
		f.Fatal(err)
	}
	addSeeds(f, "../testdata/config/*gains*.yaml")
	f.Fuzz(func(t *testing.T, data []byte) {
		g, err := ParseGains("fuzz.gains.yaml", data, plant)
		if err != nil {
			checkRefusal(t, err, "fuzz.gains.yaml")
			return
		}
		// What is accepted encodes, and reads back the same.
		enc, err := EncodeGains(g)
		if err != nil {
			t.Fatalf("accepted gains do not encode: %v", err)
		}
		back, err := ParseGains("encoded.yaml", enc, plant)
		if err != nil {
			t.Fatalf("encoded gains do not parse: %v\n%s", err, enc)
		}
		sameGains(t, back, g)
	})
}

// FuzzRewriteNoise feeds arbitrary documents to RewriteNoise: it must
// return an error or a document, never panic; and a document that parsed
// as a plant before must still parse after its noise is rewritten with the
// noise it had.
func FuzzRewriteNoise(f *testing.F) {
	for _, name := range []string{"hotwater-loop.yaml", "hotwater-loop-discrete.yaml"} {
		data, err := os.ReadFile(filepath.Join("..", "testdata", "plants", name))
		if err != nil {
			f.Fatal(err)
		}
		f.Add(data)
	}
	f.Add([]byte("noise: {process: {std: [1]}, measurement: {covariance: [[1]]}}"))
	f.Add([]byte("- a\n- b"))
	f.Fuzz(func(t *testing.T, data []byte) {
		q := mat.NewSymDense(1, []float64{1})
		RewriteNoise("fuzz.yaml", data, q, q, "note")
		plant, err := ParsePlant("fuzz.yaml", data)
		if err != nil {
			return
		}
		qd := plant.Model.Q
		if plant.Continuous != nil && plant.Continuous.Qc != nil {
			qd = plant.Continuous.Qc
		}
		out, err := RewriteNoise("fuzz.yaml", data, qd, plant.Model.R, "note")
		if err != nil {
			if plant.ProcessStd && !isDiagonal(qd) {
				return
			}
			t.Fatalf("a valid plant file could not be rewritten: %v", err)
		}
		if _, err := ParsePlant("fuzz.yaml", out); err != nil {
			// Four significant digits can turn a barely positive
			// definite covariance into one that is not; anything else is
			// a bug.
			if !strings.Contains(err.Error(), "definite") && !strings.Contains(err.Error(), "std") {
				t.Fatalf("the rewritten plant file does not parse: %v\n%s", err, out)
			}
		}
	})
}

func isDiagonal(m mat.Symmetric) bool {
	n := m.SymmetricDim()
	for i := 0; i < n; i++ {
		for j := i + 1; j < n; j++ {
			if m.At(i, j) != 0 {
				return false
			}
		}
	}
	return true
}
