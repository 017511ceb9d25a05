package config

import (
	"bytes"
	"errors"
	"os"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"

	"surmise/estimator"
)

const (
	cartGains     = "../testdata/config/double-integrator.gains.yaml"
	hotwaterGains = "../testdata/plants/hotwater-loop-discrete.gains.yaml"
)

func TestParseGainsCart(t *testing.T) {
	plant := mustLoad(t, cartFile)
	g, err := LoadGains(cartGains, plant)
	if err != nil {
		t.Fatal(err)
	}
	if g.Active != "poles-half" || g.Candidate != "kf" || len(g.Sets) != 3 || g.Plant != "double-integrator" {
		t.Fatalf("active %q candidate %q, %d sets, plant %q", g.Active, g.Candidate, len(g.Sets), g.Plant)
	}
	place := g.Set("poles-half")
	if place == nil || place.Set.Form != estimator.Prediction || len(place.Set.Gains) != 2 {
		t.Fatalf("poles-half = %+v", place)
	}
	// Closed form (SOURCES.md: double-integrator-placement): double integrator, T = 0.1, poles 0.5, 0.5 → L_p = [1, 2.5].
	pos := place.Set.Gains[1]
	if pos.Outputs != 1 || pos.L.At(0, 0) != 1 || pos.L.At(1, 0) != 2.5 {
		t.Errorf("position-only gain %v %v", pos.Outputs, mat.Formatted(pos.L))
	}
	// Poles written as strings and as numbers read the same.
	for _, pg := range place.Set.Gains {
		if len(pg.Poles) != 2 || pg.Poles[0] != 0.5 || pg.Poles[1] != 0.5 {
			t.Errorf("poles %v, want [0.5 0.5]", pg.Poles)
		}
	}
	if want := time.Date(2025, 6, 1, 14, 3, 0, 0, time.UTC); !place.Provenance.Created.Equal(want) {
		t.Errorf("created %v, want %v", place.Provenance.Created, want)
	}
	// The file lists the position-only gain first; the gain for all outputs
	// must come first in the GainSet.
	cur := g.Set("poles-half-current").Set
	if cur.Gains[0].Outputs != estimator.FullPattern(2) || cur.Gains[1].Outputs != 1 {
		t.Errorf("current-form patterns %v, %v; want the full pattern first", cur.Gains[0].Outputs, cur.Gains[1].Outputs)
	}
	kf := g.Set("kf").Set
	if kf.Form != estimator.Kalman || kf.Q.At(1, 1) != 1e-4 || kf.R.At(1, 1) != 0.0025 || kf.Gains != nil {
		t.Errorf("kf = %+v", kf)
	}
	if g.Set("nope") != nil {
		t.Error("Set of a missing name is not nil")
	}
}

// TestGainsFingerprintMismatch checks that gains designed for one model are
// refused for another, naming both fingerprints.
func TestGainsFingerprintMismatch(t *testing.T) {
	data, err := os.ReadFile(hotwaterGains)
	if err != nil {
		t.Fatal(err)
	}
	disc := mustLoad(t, hotwaterDiscret)
	if _, err := ParseGains("hw.gains.yaml", data, disc); err != nil {
		t.Fatalf("the gains of the discrete plant: %v", err)
	}
	// The same plant with one state renamed: the rows of L would be misread.
	text, err := os.ReadFile(hotwaterDiscret)
	if err != nil {
		t.Fatal(err)
	}
	cont, err := ParsePlant("renamed.yaml", bytes.Replace(text, []byte("name: heat_loss"), []byte("name: loss_drift"), 1))
	if err != nil {
		t.Fatal(err)
	}
	_, err = ParseGains("hw.gains.yaml", data, cont)
	var list *ErrorList
	if !errors.As(err, &list) || len(list.Errors) != 1 {
		t.Fatalf("error %v, want exactly the fingerprint mismatch", err)
	}
	e := list.Errors[0]
	if e.Field != "fingerprint" || e.Line != 5 || !strings.Contains(e.Msg, Fingerprint(cont.Model)) ||
		!strings.Contains(e.Msg, Fingerprint(disc.Model)) || !strings.Contains(e.Msg, "designed for a different model") {
		t.Errorf("error %v, want both fingerprints and \"designed for a different model\" at line 5", e)
	}
	// The same cart sampled at 200 ms instead of 100 ms.
	base, err := os.ReadFile(cartFile)
	if err != nil {
		t.Fatal(err)
	}
	slow, err := ParsePlant("slow.yaml", bytes.Replace(base, []byte("sample: 100ms"), []byte("sample: 200ms"), 1))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := LoadGains(cartGains, slow); err == nil || !strings.Contains(err.Error(), "designed for a different model") {
		t.Errorf("gains for 100 ms accepted for a 200 ms model: %v", err)
	}
}

// TestGainsRoundTrip encodes parsed gains and parses them again: every
// matrix, pole and field must come back identical, and encoding is
// deterministic.
func TestGainsRoundTrip(t *testing.T) {
	for _, c := range []struct{ plant, gains string }{
		{cartFile, cartGains},
		{hotwaterDiscret, hotwaterGains},
	} {
		t.Run(c.gains, func(t *testing.T) {
			plant := mustLoad(t, c.plant)
			g, err := LoadGains(c.gains, plant)
			if err != nil {
				t.Fatal(err)
			}
			enc, err := EncodeGains(g)
			if err != nil {
				t.Fatal(err)
			}
			if !bytes.Contains(enc, []byte("written by surmise design for the plant \""+plant.Name+"\"")) {
				t.Errorf("no header naming the plant:\n%s", enc[:200])
			}
			back, err := ParseGains("encoded.yaml", enc, plant)
			if err != nil {
				t.Fatalf("%v\n%s", err, enc)
			}
			sameGains(t, back, g)
			again, err := EncodeGains(back)
			if err != nil {
				t.Fatal(err)
			}
			if !bytes.Equal(again, enc) {
				t.Errorf("encoding is not deterministic:\n%s\n----\n%s", enc, again)
			}
		})
	}
}

func sameSym(a, b *mat.SymDense) bool {
	if a == nil || b == nil {
		return a == nil && b == nil
	}
	return mat.Equal(a, b)
}

func sameGains(t *testing.T, got, want *GainsFile) {
	t.Helper()
	if got.Fingerprint != want.Fingerprint || got.Active != want.Active || got.Candidate != want.Candidate ||
		got.Plant != want.Plant || len(got.Sets) != len(want.Sets) {
		t.Fatalf("header %+v, want %+v", got, want)
	}
	for i := range want.Sets {
		g, w := got.Sets[i], want.Sets[i]
		if g.Set.Name != w.Set.Name || g.Set.Form != w.Set.Form || len(g.Set.Gains) != len(w.Set.Gains) ||
			!sameSym(g.Set.Q, w.Set.Q) || !sameSym(g.Set.R, w.Set.R) {
			t.Errorf("set %d: %+v, want %+v", i, g.Set, w.Set)
			continue
		}
		for j := range w.Set.Gains {
			gg, wg := g.Set.Gains[j], w.Set.Gains[j]
			if gg.Outputs != wg.Outputs || !mat.Equal(gg.L, wg.L) || !sameSym(gg.S, wg.S) || !sameSym(gg.P, wg.P) ||
				len(gg.Poles) != len(wg.Poles) {
				t.Errorf("set %d gain %d differs", i, j)
				continue
			}
			for k := range wg.Poles {
				if gg.Poles[k] != wg.Poles[k] {
					t.Errorf("set %d gain %d pole %d: %v, want %v", i, j, k, gg.Poles[k], wg.Poles[k])
				}
			}
		}
		gp, wp := g.Provenance, w.Provenance
		if gp.Method != wp.Method || gp.Factor != wp.Factor || !gp.Created.Equal(wp.Created) || gp.Tool != wp.Tool ||
			gp.Note != wp.Note || !sameSym(gp.Q, wp.Q) || !sameSym(gp.R, wp.R) || len(gp.Poles) != len(wp.Poles) {
			t.Errorf("set %d provenance %+v, want %+v", i, gp, wp)
		}
	}
}

// TestEncodeGainsNew builds a file the way surmise design will, with values
// that test the number and pole formats, and reads it back.
func TestEncodeGainsNew(t *testing.T) {
	plant := mustLoad(t, cartFile)
	g := NewGainsFile(plant)
	g.Active = "tricky"
	g.Sets = []NamedSet{{
		Set: &estimator.GainSet{Name: "tricky", Form: estimator.Prediction, Gains: []estimator.PatternGain{{
			Outputs: estimator.FullPattern(2),
			// A − L = 0.5·I as in double-integrator.gains.yaml, plus entries
			// whose shortest decimal needs all 17 digits or an exponent.
			L:     mat.NewDense(2, 2, []float64{0.5, 0.1, 1e-300, 0.5 + 1.0/3e10}),
			Poles: []complex128{complex(0.5, 1e-7), complex(0.5, -1e-7), -0.25, complex(1.0/3, 2.0/3)},
		}}},
		Provenance: Provenance{Method: "rule-of-thumb", Factor: 2.5, Note: "yes: a note: with colons\nand a new line",
			Created: time.Date(2025, 6, 1, 14, 3, 0, 123456789, time.FixedZone("", 7200)), Tool: "surmise test",
			Poles: []complex128{0.5, 0.5}, Q: diagonal([]float64{1e-3, 0.1}), R: diagonal([]float64{0.01, 0.05})},
	}}
	// Four poles for two states: EncodeGains writes them; ParseGains refuses them.
	enc, err := EncodeGains(g)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := ParseGains("x.yaml", enc, plant); err == nil || !strings.Contains(err.Error(), "4 poles, want 2") {
		t.Fatalf("error %v, want the pole count refused", err)
	}
	g.Sets[0].Set.Gains[0].Poles = g.Sets[0].Set.Gains[0].Poles[:2]
	enc, err = EncodeGains(g)
	if err != nil {
		t.Fatal(err)
	}
	back, err := ParseGains("x.yaml", enc, plant)
	if err != nil {
		t.Fatalf("%v\n%s", err, enc)
	}
	sameGains(t, back, g)

	bad := *g
	bad.Sets = []NamedSet{{Set: &estimator.GainSet{Name: "k", Form: estimator.Kalman, Q: diagonal([]float64{1, 1})}}}
	if _, err := EncodeGains(&bad); err == nil {
		t.Error("a kalman set without R was encoded")
	}
}

func TestFormatPole(t *testing.T) {
	for _, c := range []struct {
		z    complex128
		want string
	}{
		{0.81, "0.81"},
		{complex(0.5, 0.2), "0.5+0.2i"},
		{complex(0.5, -0.2), "0.5-0.2i"},
		{complex(-1e-5, 2e-7), "-1e-05+2e-07i"},
		{0, "0"},
	} {
		if got := formatPole(c.z); got != c.want {
			t.Errorf("formatPole(%v) = %q, want %q", c.z, got, c.want)
		}
	}
}

// TestParseGainsOldMethodWord: gains files written before the placement
// method was called "poles" say "method: place"; they still load, and the
// method reads as "poles".
func TestParseGainsOldMethodWord(t *testing.T) {
	plant := mustLoad(t, cartFile)
	b, err := os.ReadFile(cartGains)
	if err != nil {
		t.Fatal(err)
	}
	old := strings.ReplaceAll(string(b), "method: poles", "method: place")
	if old == string(b) {
		t.Fatal("the fixture has no \"method: poles\" to turn into the old word")
	}
	g, err := ParseGains(cartGains, []byte(old), plant)
	if err != nil {
		t.Fatal(err)
	}
	for _, ns := range g.Sets {
		if ns.Provenance.Method != "poles" && ns.Provenance.Method != "kalman" {
			t.Errorf("set %s: method %q, want the old word read as \"poles\"", ns.Set.Name, ns.Provenance.Method)
		}
	}
}
