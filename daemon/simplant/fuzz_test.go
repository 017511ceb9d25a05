package simplant

import (
	"os"
	"path/filepath"
	"reflect"
	"testing"
)

// FuzzParseScenario feeds arbitrary bytes to the scenario parser: it must
// not panic, and a scenario it accepts must run, and survive Format and a
// second parse unchanged.
func FuzzParseScenario(f *testing.F) {
	plant := demoPlant(f)
	seeds, _ := filepath.Glob(filepath.Join("testdata", "bad", "*.yaml"))
	seeds = append(seeds, filepath.Join("testdata", "example.yaml"))
	for _, p := range seeds {
		data, err := os.ReadFile(p)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(data)
	}
	for _, name := range BuiltinNames {
		sc, _ := Builtin(name, plant)
		f.Add(Format(sc))
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		sc, err := ParseScenario("fuzz.yaml", data, plant)
		if err != nil {
			return
		}
		sim, err := New(plant, sc, Options{Seed: 1})
		if err != nil {
			t.Fatalf("accepted by ParseScenario, refused by New: %v", err)
		}
		st := NewStream(sim)
		for range 50 {
			st.Next()
		}
		back, err := ParseScenario("back.yaml", Format(sc), plant)
		if err != nil {
			t.Fatalf("Format wrote a file that does not parse: %v\n%s", err, Format(sc))
		}
		back.Events, sc.Events = withoutLines(back.Events), withoutLines(sc.Events)
		if !reflect.DeepEqual(back, sc) {
			t.Fatalf("round trip:\n got %+v\nwant %+v", back, sc)
		}
	})
}
