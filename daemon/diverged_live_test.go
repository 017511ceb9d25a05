package daemon_test

import (
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"surmise/daemon"
)

// TestLiveDiverged runs the demo plant on the daemon, with the outputs'
// valid ranges removed, and feeds it temperatures stuck near 10⁶ degC: once
// the gate releases, the estimate leaves element_temp's range in the plant
// file, and the daemon says so everywhere — the status metric is diverged
// and /readyz fails. With sane samples again the engine re-initialises after
// daemon.DivergedHold ticks and the daemon is ready again.
func TestLiveDiverged(t *testing.T) {
	const ts = 20 * time.Millisecond
	spec := demoPlant(t, ts)
	spec.Plant.Inputs = longMaxAge(spec.Plant.Inputs)
	outs := longMaxAge(spec.Plant.Outputs)
	for j := range outs {
		outs[j].HasRange = false
	}
	spec.Plant.Outputs = outs
	r := startDaemon(t, daemon.Options{Plants: []daemon.PlantSpec{spec}, EmbeddedPort: -1})
	nc, err := nats.Connect(r.ep.BusURL)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	base := "http://" + r.ep.HTTPAddr.String()
	off := 0.0
	publish := func() {
		now := time.Now()
		for _, m := range []struct {
			subject string
			v       float64
		}{{spec.Plant.Inputs[0].Subject, 6}, {spec.Plant.Outputs[0].Subject, 61 + off}, {spec.Plant.Outputs[1].Subject, 54.4 + off}} {
			if err := nc.Publish(m.subject, samplePayload(m.v, now)); err != nil {
				t.Fatal(err)
			}
		}
		if err := nc.Flush(); err != nil {
			t.Fatal(err)
		}
	}
	status := map[string]string{"estimator": spec.Plant.Name, "status": "diverged"}
	state := func(want float64, wantCode int) func() error {
		return func() error {
			publish()
			v, _ := gathered(t, r.reg, "surmise_status", status)
			code, body := httpGet(t, base+"/readyz")
			if v != want || code != wantCode {
				return fmt.Errorf("surmise_status{status=diverged} = %v, /readyz %d %s", v, code, body)
			}
			return nil
		}
	}
	checkFor(t, 10*time.Second, ts, state(0, 200))
	off = 1e6
	checkFor(t, 10*time.Second, ts/2, state(1, 503))
	if _, body := httpGet(t, base+"/readyz"); !strings.Contains(body, "diverged") {
		t.Errorf("/readyz does not say why: %s", body)
	}
	off = 0
	checkFor(t, 10*time.Second, ts, state(0, 200))
	if err := r.stop(); err != nil {
		t.Fatalf("Run: %v", err)
	}
}
