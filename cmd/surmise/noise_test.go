package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"

	"surmise/config"
)

// TestNoiseVerb simulates an hour of the demo plant with its own noise (the
// steady scenario: no faults), identifies the noise from it starting from a
// plant file whose measurement noise is stated three times too large, and
// checks the printout and the plant file written: it parses, keeps the
// model, and holds measurement standard deviations near the simulated 0.05 K
// (the numerics are checked in estimator and daemon).
func TestNoiseVerb(t *testing.T) {
	dir := t.TempDir()
	data := filepath.Join(dir, "steady.csv")
	if _, stderr, code := cli(t, "simulate", plantPath("hotwater-loop.yaml"), "--scenario", "steady", "--seed", "3", "--for", "1h",
		"--start", "2026-01-05T08:00:00Z", "--csv", data); code != 0 {
		t.Fatalf("simulate: exit %d: %s", code, stderr)
	}
	orig, err := os.ReadFile(plantPath("hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	mis := filepath.Join(dir, "mis.yaml") // noise needs no gains file
	if err := os.WriteFile(mis, []byte(strings.Replace(string(orig), "std: [0.05, 0.05]", "std: [0.15, 0.15]", 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	out := filepath.Join(dir, "identified.yaml")
	stdout, stderr, code := cli(t, "noise", mis, "--data", data, "-o", out)
	if code != 0 {
		t.Fatalf("exit %d\n%s%s", code, stdout, stderr)
	}
	for _, want := range []string{"3600 ticks every 1s", "least squares: 6 unknowns", "rank 6",
		"process noise (continuous intensity)", "measurement noise (covariance per sample)", "tank_outlet", "was 0.0225",
		"wrote " + out + "; next: surmise design " + out} {
		if !strings.Contains(stdout, want) {
			t.Errorf("stdout lacks %q:\n%s", want, stdout)
		}
	}
	got, err := config.LoadPlant(out)
	if err != nil {
		t.Fatal(err)
	}
	text, _ := os.ReadFile(out)
	if !strings.Contains(string(text), "# Noise identified by") || !strings.Contains(string(text), "autocovariance least squares") {
		t.Errorf("no provenance above the noise:\n%s", text)
	}
	for j := 0; j < 2; j++ {
		if s := got.Model.R.At(j, j); s < 0.045*0.045 || s > 0.055*0.055 {
			t.Errorf("measurement variance %d = %v, simulated with 0.0025", j, s)
		}
	}
	if config.Fingerprint(got.Model) != config.Fingerprint(mustPlant(t, plantPath("hotwater-loop.yaml")).Model) {
		t.Error("the model changed")
	}

	// Too short a recording is an error that says so.
	_, stderr, code = cli(t, "noise", plantPath("hotwater-loop.yaml"), "--data", recordingPath("hotwater-loop-rehearsal.csv"))
	if code == 0 || !strings.Contains(stderr, "too little data") {
		t.Errorf("rehearsal recording: exit %d, %s", code, stderr)
	}
}

func mustPlant(t *testing.T, path string) *config.Plant {
	t.Helper()
	p, err := config.LoadPlant(path)
	if err != nil {
		t.Fatal(err)
	}
	return p
}
