package daemon

import (
	"bytes"
	"encoding/json"
	"math"
	"testing"
	"time"
)

// decodedEstimate is the bus JSON as encoding/json sees it; pointers are nil
// for null.
type decodedEstimate struct {
	Estimator   string    `json:"estimator"`
	Instance    string    `json:"instance"`
	Time        time.Time `json:"time"`
	Seq         uint64    `json:"seq"`
	Status      string    `json:"status"`
	Gains       string    `json:"gains"`
	Fingerprint string    `json:"fingerprint"`
	Form        string    `json:"form"`
	States      map[string]struct {
		Value *float64 `json:"value"`
		Std   *float64 `json:"std"`
		Unit  string   `json:"unit"`
	} `json:"states"`
	Inputs map[string]struct {
		Value *float64 `json:"value"`
		Age   *float64 `json:"age"`
		Stale bool     `json:"stale"`
		Unit  string   `json:"unit"`
	} `json:"inputs"`
	Outputs map[string]struct {
		Measured      *float64 `json:"measured"`
		Predicted     *float64 `json:"predicted"`
		Innovation    *float64 `json:"innovation"`
		InnovationStd *float64 `json:"innovation_std"`
		Age           *float64 `json:"age"`
		Used          bool     `json:"used"`
		Outlier       bool     `json:"outlier"`
		Unit          string   `json:"unit"`
	} `json:"outputs"`
	NIS     *float64    `json:"nis"`
	Dof     int         `json:"dof"`
	NISMean *float64    `json:"nis_mean"`
	NISBand [2]*float64 `json:"nis_band"`
}

// jsonSame reports whether a decoded nullable number is v: null for NaN and
// ±Inf, else exactly v (strconv's shortest form round-trips).
func jsonSame(p *float64, v float64) bool {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return p == nil
	}
	return p != nil && *p == v
}

func TestEstimateAppendJSON(t *testing.T) {
	est := &Estimate{
		Estimator:   "hotwater-loop",
		Instance:    `bench-7 "a"`,
		Time:        time.Date(2025, 3, 1, 12, 0, 0, 123456789, time.FixedZone("CET", 3600)),
		Seq:         18446744073709551615,
		Status:      StatusStaleInput,
		Gains:       "kalman-current",
		Fingerprint: "sha256:00ff",
		Form:        "current",
		States: []StateEstimate{
			{Name: "element_temp", Unit: "°C", Value: 91.20000000000002, Std: 0.0388},
			{Name: `odd "name"\ with	tab`, Unit: "kW\n", Value: -1e-300, Std: math.NaN()},
			{Name: "big", Unit: "", Value: 6.02214076e23, Std: math.Inf(1)},
		},
		Inputs: []InputValue{{Name: "heater_power", Unit: "kW", Value: 6, Age: math.NaN(), Stale: true}},
		Outputs: []OutputEstimate{
			{Name: "tank_outlet", Unit: "degC", Measured: 61.25, Predicted: 61.2, Innovation: 0.05000000000000426,
				InnovationStd: 0.0509, Age: 0.25, Used: true},
			{Name: "hx_outlet", Unit: "degC", Measured: math.NaN(), Predicted: 54.4, Innovation: math.NaN(),
				InnovationStd: math.NaN(), Age: math.Inf(-1), Outlier: true},
		},
		NIS: 0.981, Dof: 1, NISMean: math.NaN(), NISBand: [2]float64{0.6471, math.NaN()},
	}
	buf := est.AppendJSON(nil)
	var d decodedEstimate
	if err := json.Unmarshal(buf, &d); err != nil {
		t.Fatalf("encoding/json cannot decode %s: %v", buf, err)
	}
	if !d.Time.Equal(est.Time) || d.Time.Location() != time.UTC {
		t.Errorf("time %v, want %v in UTC", d.Time, est.Time)
	}
	if d.Estimator != est.Estimator || d.Instance != est.Instance {
		t.Errorf("estimator %q instance %q, want %q %q", d.Estimator, d.Instance, est.Estimator, est.Instance)
	}
	if d.Seq != est.Seq || d.Status != "stale-input" || d.Gains != est.Gains || d.Fingerprint != est.Fingerprint ||
		d.Form != est.Form || d.Dof != est.Dof {
		t.Errorf("header decoded as %+v", d)
	}
	if len(d.States) != len(est.States) || len(d.Outputs) != len(est.Outputs) || len(d.Inputs) != len(est.Inputs) {
		t.Fatalf("decoded %d states, %d inputs, %d outputs", len(d.States), len(d.Inputs), len(d.Outputs))
	}
	for _, s := range est.States {
		g, ok := d.States[s.Name]
		if !ok || !jsonSame(g.Value, s.Value) || !jsonSame(g.Std, s.Std) || g.Unit != s.Unit {
			t.Errorf("state %q decoded as %+v (ok %v), want %+v", s.Name, g, ok, s)
		}
	}
	for _, in := range est.Inputs {
		g := d.Inputs[in.Name]
		if !jsonSame(g.Value, in.Value) || !jsonSame(g.Age, in.Age) || g.Stale != in.Stale || g.Unit != in.Unit {
			t.Errorf("input %q decoded as %+v, want %+v", in.Name, g, in)
		}
	}
	for _, o := range est.Outputs {
		g := d.Outputs[o.Name]
		if !jsonSame(g.Measured, o.Measured) || !jsonSame(g.Predicted, o.Predicted) || !jsonSame(g.Innovation, o.Innovation) ||
			!jsonSame(g.InnovationStd, o.InnovationStd) || !jsonSame(g.Age, o.Age) || g.Used != o.Used ||
			g.Outlier != o.Outlier || g.Unit != o.Unit {
			t.Errorf("output %q decoded as %+v, want %+v", o.Name, g, o)
		}
	}
	if !jsonSame(d.NIS, est.NIS) || !jsonSame(d.NISMean, est.NISMean) || !jsonSame(d.NISBand[0], est.NISBand[0]) ||
		!jsonSame(d.NISBand[1], est.NISBand[1]) {
		t.Errorf("NIS decoded as %v %v %v, want %v %v %v", d.NIS, d.NISMean, d.NISBand, est.NIS, est.NISMean, est.NISBand)
	}

	// Appending to a buffer with room allocates nothing.
	buf = make([]byte, 0, 4096)
	if n := testing.AllocsPerRun(100, func() { buf = est.AppendJSON(buf[:0]) }); n != 0 {
		t.Errorf("AppendJSON: %v allocations per call, want 0", n)
	}
}

// FuzzAppendString checks that any string written by appendString is a JSON
// string that encoding/json decodes back to it, invalid UTF-8 bytes each
// replaced by U+FFFD (as converting to []rune does).
func FuzzAppendString(f *testing.F) {
	for _, s := range []string{"", "tank_outlet", `"\`, "\x00\x1f\x7f", "°C", "\xff\xfe", "a\u2028b", "\xed\xa0\x80"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		b := appendString(nil, s)
		var got string
		if err := json.Unmarshal(b, &got); err != nil {
			t.Fatalf("appendString(%q) = %s, not a JSON string: %v", s, b, err)
		}
		if want := string([]rune(s)); got != want {
			t.Fatalf("appendString(%q) decodes to %q, want %q", s, got, want)
		}
	})
}

// BenchmarkEstimateAppendJSON measures the encoding of one demo-plant
// estimate into a reused buffer.
func BenchmarkEstimateAppendJSON(b *testing.B) {
	pl, gf := engDemoPlant(b)
	e := NewEngine(pl, engPrepare(b, pl, gf, "kalman-tv"), EngineOptions{})
	est := e.NewEstimate()
	e.Offer(0, 6, engT0, engT0)
	e.Offer(1, 61.01, engT0, engT0)
	e.Offer(2, 54.38, engT0, engT0)
	e.Tick(engT0, est)
	buf := make([]byte, 0, 4096)
	b.ReportAllocs()
	for b.Loop() {
		buf = est.AppendJSON(buf[:0])
	}
	b.SetBytes(int64(len(buf)))
}

// TestAppendJSONWithCache encodes the demo plant's estimates tick after tick
// with and without a NumberCache: the two texts must be the same byte for
// byte, whatever changes between ticks (measurements missing every third
// tick, an outlier, a reset to a state far away), and the cached encoding
// must allocate nothing once warm.
func TestAppendJSONWithCache(t *testing.T) {
	pl, gf := engDemoPlant(t)
	e := NewEngine(pl, engPrepare(t, pl, gf, "kalman-current"), EngineOptions{})
	est := e.NewEstimate()
	var cache NumberCache
	var plain, cached []byte
	for k := range 300 {
		tk := engAt(float64(k))
		e.Offer(0, 6, tk, tk)
		y := 61 + 0.01*float64(k%7)
		if k == 150 {
			y = 90 // an outlier
		}
		e.Offer(1, y, tk, tk)
		if k%3 != 0 {
			e.Offer(2, 54.4+0.001*float64(k%5), tk, tk)
		}
		if k == 200 {
			e.enqueue(laneOp{kind: opReset, x: []float64{80, 70, 60, 0.5}})
		}
		e.Tick(tk, est)
		plain = est.AppendJSON(plain[:0])
		cached = est.AppendJSONWith(cached[:0], &cache)
		if !bytes.Equal(plain, cached) {
			t.Fatalf("tick %d: cached encoding differs:\n%s\nwant\n%s", k, cached, plain)
		}
	}
	if n := testing.AllocsPerRun(100, func() { cached = est.AppendJSONWith(cached[:0], &cache) }); n != 0 {
		t.Errorf("AppendJSONWith: %v allocations per call, want 0", n)
	}
}

// FuzzNumberCache writes a sequence of numbers at two places through one
// cache and checks each text against the uncached one.
func FuzzNumberCache(f *testing.F) {
	f.Add(1.5, 1.5, math.NaN(), -0.0, 0.0, math.Inf(1))
	f.Add(-2.2250738585072014e-308, 1e21, 1e-7, 123456789.125, 0.1, 0.1)
	f.Fuzz(func(t *testing.T, a, b, c, d, e, g float64) {
		var cache NumberCache
		vals := []float64{a, b, c, d, e, g}
		for i := 0; i+1 < len(vals); i += 2 {
			cache.next = 0
			for _, v := range vals[i : i+2] {
				got := cache.appendFloat(nil, v)
				if want := appendFloat(nil, v); !bytes.Equal(got, want) {
					t.Fatalf("cached text of %v is %q, want %q", v, got, want)
				}
			}
		}
	})
}

// BenchmarkTickAndEncode measures a tick of the demo plant and the
// encoding of its estimate, with and without a NumberCache (the samples
// change every tick, as on a plant).
func BenchmarkTickAndEncode(b *testing.B) {
	for _, withCache := range []bool{false, true} {
		b.Run(map[bool]string{false: "plain", true: "cached"}[withCache], func(b *testing.B) {
			pl, gf := engDemoPlant(b)
			e := NewEngine(pl, engPrepare(b, pl, gf, "kalman-current"), EngineOptions{})
			est := e.NewEstimate()
			var cache *NumberCache
			if withCache {
				cache = &NumberCache{}
			}
			buf := make([]byte, 0, 4096)
			b.ReportAllocs()
			k := 0
			for b.Loop() {
				e.Tick(engDemoOffer(e, k), est)
				buf = est.AppendJSONWith(buf[:0], cache)
				k++
			}
		})
	}
}
