package config

import (
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

func TestRewriteNoise(t *testing.T) {
	path := filepath.Join("..", "testdata", "plants", "hotwater-loop.yaml")
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	orig, err := ParsePlant(path, data)
	if err != nil {
		t.Fatal(err)
	}
	if !orig.ProcessStd || !orig.MeasurementStd {
		t.Fatalf("the demo plant gives std for both noises; got %v, %v", orig.ProcessStd, orig.MeasurementStd)
	}
	q := mat.NewSymDense(4, []float64{1e-4, 0, 0, 0, 0, 4e-6, 0, 0, 0, 0, 2.5e-5, 0, 0, 0, 0, 0})
	r := mat.NewSymDense(2, []float64{0.01, 0, 0, 0.0036})
	out, err := RewriteNoise(path, data, q, r, "identified by a test\nsecond line")
	if err != nil {
		t.Fatal(err)
	}
	got, err := ParsePlant(path, out)
	if err != nil {
		t.Fatalf("the rewritten file does not parse: %v\n%s", err, out)
	}
	if Fingerprint(got.Model) != Fingerprint(orig.Model) {
		t.Error("the rewritten file's model fingerprint changed")
	}
	if !mat.EqualApprox(got.Continuous.Qc, q, 1e-12) || !mat.EqualApprox(got.Model.R, r, 1e-12) {
		t.Errorf("Qc %v, R %v; want %v, %v", mat.Formatted(got.Continuous.Qc), mat.Formatted(got.Model.R), mat.Formatted(q), mat.Formatted(r))
	}
	for _, want := range []string{"# identified by a test\n# second line\nnoise:", "std: [0.1, 0.06]", "# K, per sample", "sample: 1s"} {
		if !strings.Contains(string(out), want) {
			t.Errorf("rewritten file lacks %q:\n%s", want, out)
		}
	}

	// A full covariance cannot be written as std.
	q.SetSym(0, 1, 1e-6)
	if _, err := RewriteNoise(path, data, q, r, ""); err == nil || !strings.Contains(err.Error(), "off the diagonal") {
		t.Errorf("full Q into std: err %v", err)
	}
	// A covariance form is kept as a covariance.
	cov := strings.Replace(string(data), "std: [0.05, 0.05]", "covariance: [[0.0025, 0], [0, 0.0025]]", 1)
	r.SetSym(0, 1, 0.001)
	q.SetSym(0, 1, 0)
	out, err = RewriteNoise(path, []byte(cov), q, r, "")
	if err != nil {
		t.Fatal(err)
	}
	got, err = ParsePlant(path, out)
	if err != nil || got.MeasurementStd || math.Abs(got.Model.R.At(0, 1)-0.001) > 1e-15 {
		t.Errorf("covariance form: %v, std %v, R %v\n%s", err, got != nil && got.MeasurementStd, got, out)
	}
}
