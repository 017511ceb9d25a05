package config_test

import (
	"testing"

	"surmise/config"
)

// TestSubjects checks the documented subjects and column of a plant, with
// and without a publish key.
func TestSubjects(t *testing.T) {
	for _, tc := range []struct {
		plant         *config.Plant
		prefix, truth string
	}{
		{&config.Plant{Name: "dryer"}, "surmise.dryer", "surmise.dryer.truth.x1"},
		{&config.Plant{Name: "dryer", Publish: "site.dryer"}, "site.dryer", "site.dryer.truth.x1"},
	} {
		if got := tc.plant.PublishPrefix(); got != tc.prefix {
			t.Errorf("%+v: prefix %q, want %q", tc.plant, got, tc.prefix)
		}
		if got := tc.plant.TruthSubject("x1"); got != tc.truth {
			t.Errorf("%+v: truth subject %q, want %q", tc.plant, got, tc.truth)
		}
	}
	if got := config.TruthColumn("x1"); got != "truth.x1" {
		t.Errorf("truth column %q, want truth.x1", got)
	}
}
