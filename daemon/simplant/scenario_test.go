package simplant

import (
	"errors"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"surmise/config"
)

// demoPlant loads the invented demo plant of testdata/plants.
func demoPlant(t testing.TB) *config.Plant {
	t.Helper()
	plant, err := config.LoadPlant(filepath.Join("..", "..", "testdata", "plants", "hotwater-loop.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	return plant
}

// withoutLines returns the events with Line cleared, to compare a parsed
// scenario with a built one.
func withoutLines(evs []Event) []Event {
	out := make([]Event, len(evs))
	for i, ev := range evs {
		ev.Line = 0
		out[i] = ev
	}
	return out
}

func TestParseScenarioExample(t *testing.T) {
	plant := demoPlant(t)
	sc, err := LoadScenario(filepath.Join("testdata", "example.yaml"), plant)
	if err != nil {
		t.Fatal(err)
	}
	s := time.Second
	// Expected: the events as written in testdata/example.yaml.
	want := []Event{
		{Kind: PRBS, Signal: "heater_power", At: 0, Low: 4.5, High: 7.5, Hold: 3 * s, For: 30 * s, Line: 6},
		{Kind: Step, Signal: "heater_power", At: 30 * s, Value: 7, Line: 7},
		{Kind: Dropout, Signal: "tank_outlet", At: 10 * s, For: 5 * s, Line: 8},
		{Kind: Bias, Signal: "hx_outlet", At: 40 * s, Value: -0.8, Line: 11},
		{Kind: Spikes, Signal: "tank_outlet", At: 50 * s, Value: 3, Count: 2, Every: 2 * s, Line: 12},
		{Kind: Slow, Signal: "hx_outlet", At: 55 * s, Ticks: 4, For: 20 * s, Line: 13},
		{Kind: Jitter, Signal: AllSignals, At: 60 * s, Max: 300 * time.Millisecond, For: 10 * s, Line: 14},
		{Kind: Jitter, Signal: "heater_power", At: 75 * s, Max: 2 * s, For: 5 * s, Line: 15},
	}
	if sc.Name != "example" || sc.Length != 90*s || !sc.Repeat {
		t.Errorf("got name %q, length %v, repeat %v; want example, 1m30s, true", sc.Name, sc.Length, sc.Repeat)
	}
	if !reflect.DeepEqual(sc.Events, want) {
		t.Errorf("events:\n got %+v\nwant %+v", sc.Events, want)
	}
}

func TestParseScenarioDefaultLength(t *testing.T) {
	plant := demoPlant(t)
	// The demo plant samples every second: a step at 12 s lasts to 13 s at
	// least, the dropout ends at 15 s, so the scenario is 15 s long.
	for _, tc := range []struct {
		src  string
		want time.Duration
	}{
		{"events:\n  - {at: 12s, step: heater_power, value: 6}\n", 13 * time.Second},
		{"events:\n  - {at: 12s, step: heater_power, value: 6}\n  - {at: 5s, dropout: hx_outlet, for: 10s}\n", 15 * time.Second},
		{"events:\n  - {at: 0s, spikes: hx_outlet, value: 1, count: 3, every: 5s}\n", 11 * time.Second},
	} {
		sc, err := ParseScenario("s.yaml", []byte(tc.src), plant)
		if err != nil {
			t.Fatalf("%q: %v", tc.src, err)
		}
		if sc.Length != tc.want {
			t.Errorf("%q: length %v, want %v", tc.src, sc.Length, tc.want)
		}
	}
}

// TestParseScenarioBad reads every testdata/bad/*.bad.yaml; its first line
// says the error it must produce ("# want: :line:column: field: message"),
// which must appear, after the file name, in the error.
func TestParseScenarioBad(t *testing.T) {
	plant := demoPlant(t)
	files, err := filepath.Glob(filepath.Join("testdata", "bad", "*.bad.yaml"))
	if err != nil || len(files) == 0 {
		t.Fatalf("no bad files: %v", err)
	}
	for _, path := range files {
		t.Run(filepath.Base(path), func(t *testing.T) {
			data, err := os.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			first, _, _ := strings.Cut(string(data), "\n")
			want, ok := strings.CutPrefix(first, "# want: ")
			if !ok {
				t.Fatalf("first line %q does not say what error is wanted", first)
			}
			_, err = ParseScenario(path, data, plant)
			if err == nil {
				t.Fatal("parsed without error")
			}
			var list *config.ErrorList
			if !errors.As(err, &list) {
				t.Fatalf("error %T is not a *config.ErrorList: %v", err, err)
			}
			if !strings.Contains(err.Error(), path+want) {
				t.Errorf("error\n%v\ndoes not contain\n%s%s", err, path, want)
			}
		})
	}
}

// TestBuiltinRoundTrip checks that Format writes each built-in scenario as
// a file that parses back to the same scenario.
func TestBuiltinRoundTrip(t *testing.T) {
	plant := demoPlant(t)
	for _, name := range BuiltinNames {
		sc, err := Builtin(name, plant)
		if err != nil {
			t.Fatal(err)
		}
		if err := validate(sc, plant); err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		back, err := ParseScenario(name+".yaml", Format(sc), plant)
		if err != nil {
			t.Fatalf("%s: %v\n%s", name, err, Format(sc))
		}
		back.Events = withoutLines(back.Events)
		if !reflect.DeepEqual(back, sc) {
			t.Errorf("%s: round trip\n got %+v\nwant %+v", name, back, sc)
		}
	}
	if _, err := Builtin("nonesuch", plant); err == nil {
		t.Error("Builtin(nonesuch): no error")
	}
}

// TestBuiltinRehearsal checks the demo scenario against what the package
// documentation promises: every kind of event, about two minutes, repeated,
// the heater moving within its wired range [0, 9] kW.
func TestBuiltinRehearsal(t *testing.T) {
	plant := demoPlant(t)
	sc, err := Builtin("rehearsal", plant)
	if err != nil {
		t.Fatal(err)
	}
	if sc.Length != 2*time.Minute || !sc.Repeat {
		t.Errorf("length %v, repeat %v; want 2m0s, true", sc.Length, sc.Repeat)
	}
	kinds := map[Kind]bool{}
	for _, ev := range sc.Events {
		kinds[ev.Kind] = true
		if ev.Kind == PRBS && !(ev.Low >= 0 && ev.High <= 9 && ev.High-ev.Low >= 1) {
			t.Errorf("PRBS between %g and %g: want a swing of at least 1 kW inside [0, 9]", ev.Low, ev.High)
		}
	}
	for k := Step; k < numKinds; k++ {
		if !kinds[k] {
			t.Errorf("no %s event", k)
		}
	}
}

func TestValidateHandBuilt(t *testing.T) {
	plant := demoPlant(t)
	sc := &Scenario{Name: "hand", Length: 10 * time.Second, Events: []Event{
		{Kind: Slow, Signal: "hx_outlet", At: time.Second, For: 20 * time.Second, Ticks: 3},
	}}
	_, err := New(plant, sc, Options{})
	want := "hand: events[0]: ends at 21s, after the scenario's length 10s"
	if err == nil || err.Error() != want {
		t.Errorf("got %v, want %s", err, want)
	}
}
