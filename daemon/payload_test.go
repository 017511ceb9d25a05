package daemon

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
	"testing"
	"time"
)

func TestDecodeSample(t *testing.T) {
	recv := time.Date(2026, 12, 2, 10, 0, 1, 0, time.UTC)
	// Expected values are the literals of the payload, and the RFC 3339
	// times read by hand (RFC 3339 §5.6: a zone offset of +01:00 means the
	// UTC time is one hour earlier).
	ts := time.Date(2026, 12, 2, 10, 0, 0, 123_000_000, time.UTC)
	tests := []struct {
		name    string
		payload string
		value   float64
		time    time.Time
		reason  Reason // ReasonUnknown with ok = true means no error
		ok      bool
	}{
		{"bare", "61.2", 61.2, recv, 0, true},
		{"bare with whitespace", " \t-4e-3\r\n", -0.004, recv, 0, true},
		{"bare integer", "42", 42, recv, 0, true},
		{"bare leading plus and dot", "+.5", 0.5, recv, 0, true},
		{"bare trailing dot", "7.", 7, recv, 0, true},
		{"bare capital exponent", "1.5E+2", 150, recv, 0, true},
		{"bare negative zero", "-0", math.Copysign(0, -1), recv, 0, true},
		{"bare underflow to zero", "1e-400", 0, recv, 0, true},
		{"bare largest float64", "1.7976931348623157e308", math.MaxFloat64, recv, 0, true},

		{"time in year 1", `{"value": 1, "time": "0001-01-01T00:00:00Z"}`, 0, time.Time{}, ReasonTime, false},
		{"time before 1970", `{"value": 1, "time": "1969-12-31T23:59:59.999Z"}`, 0, time.Time{}, ReasonTime, false},
		{"time at 1970", `{"value": 1, "time": "1970-01-01T00:00:00Z"}`, 1, time.Unix(0, 0).UTC(), 0, true},
		{"oversize", strings.Repeat(" ", MaxSampleBytes) + "1", 0, time.Time{}, ReasonOversize, false},

		{"empty", "", 0, time.Time{}, ReasonParse, false},
		{"only whitespace", "  \n", 0, time.Time{}, ReasonParse, false},
		{"words", "hot", 0, time.Time{}, ReasonParse, false},
		{"hexadecimal", "0x1p3", 0, time.Time{}, ReasonParse, false},
		{"underscores", "1_000", 0, time.Time{}, ReasonParse, false},
		{"two numbers", "1 2", 0, time.Time{}, ReasonParse, false},
		{"unit suffix", "61.2C", 0, time.Time{}, ReasonParse, false},
		{"lone sign", "-", 0, time.Time{}, ReasonParse, false},
		{"lone dot", ".", 0, time.Time{}, ReasonParse, false},
		{"exponent without digits", "1e", 0, time.Time{}, ReasonParse, false},
		{"comma decimal", "61,2", 0, time.Time{}, ReasonParse, false},
		{"NaN", "NaN", 0, time.Time{}, ReasonNaN, false},
		{"nan lower case", "nan", 0, time.Time{}, ReasonNaN, false},
		{"infinity", "-Infinity", 0, time.Time{}, ReasonNaN, false},
		{"inf", "+inf", 0, time.Time{}, ReasonNaN, false},
		{"overflow", "1e400", 0, time.Time{}, ReasonNaN, false},

		{"json value and time", `{"value": 61.2, "time": "2026-12-02T10:00:00.123Z"}`, 61.2, ts, 0, true},
		{"json time with offset", `{"value": 1, "time": "2026-12-02T11:00:00.123+01:00"}`, 1, ts, 0, true},
		{"json time without fraction", `{"value": 1, "time": "2026-12-02T10:00:00Z"}`, 1, ts.Truncate(time.Second), 0, true},
		{"json value only", `{"value": -3}`, -3, recv, 0, true},
		{"json null time", `{"value": 2.5, "time": null}`, 2.5, recv, 0, true},
		{"json time first", ` {"time": "2026-12-02T10:00:00.123Z", "value": 0}` + "\n", 0, ts, 0, true},
		{"json extra fields ignored", `{"value": 5, "unit": "degC", "tags": {"a": [1, 2]}}`, 5, recv, 0, true},

		{"json no value", `{"time": "2026-12-02T10:00:00.123Z"}`, 0, time.Time{}, ReasonParse, false},
		{"json value as string", `{"value": "61.2"}`, 0, time.Time{}, ReasonParse, false},
		{"json value null", `{"value": null}`, 0, time.Time{}, ReasonParse, false},
		{"json value object", `{"value": {"v": 1}}`, 0, time.Time{}, ReasonParse, false},
		{"json value twice", `{"value": 1, "value": 2}`, 0, time.Time{}, ReasonParse, false},
		{"json time twice", `{"value": 1, "time": null, "time": null}`, 0, time.Time{}, ReasonParse, false},
		{"json key case matters", `{"Value": 1}`, 0, time.Time{}, ReasonParse, false},
		{"json time not RFC 3339", `{"value": 1, "time": "2026-12-02 10:00:00"}`, 0, time.Time{}, ReasonParse, false},
		{"json time without zone", `{"value": 1, "time": "2026-12-02T10:00:00.123"}`, 0, time.Time{}, ReasonParse, false},
		{"json empty time", `{"value": 1, "time": ""}`, 0, time.Time{}, ReasonParse, false},
		{"json time as number", `{"value": 1, "time": 1764669600}`, 0, time.Time{}, ReasonParse, false},
		{"json trailing data", `{"value": 1} 2`, 0, time.Time{}, ReasonParse, false},
		{"json truncated", `{"value": 1`, 0, time.Time{}, ReasonParse, false},
		{"json overflow", `{"value": 1e400}`, 0, time.Time{}, ReasonNaN, false},
		{"json array", `[61.2]`, 0, time.Time{}, ReasonParse, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			v, got, err := DecodeSample([]byte(tc.payload), recv)
			if !tc.ok {
				if err == nil {
					t.Fatalf("DecodeSample(%q) = %v, %v, want an error", tc.payload, v, got)
				}
				var se *SampleError
				if !errors.As(err, &se) {
					t.Fatalf("error %v is not a *SampleError", err)
				}
				if r := ReasonOf(err); r != tc.reason {
					t.Errorf("DecodeSample(%q) reason %q (%v), want %q", tc.payload, r, err, tc.reason)
				}
				return
			}
			if err != nil {
				t.Fatalf("DecodeSample(%q): %v", tc.payload, err)
			}
			if v != tc.value || math.Signbit(v) != math.Signbit(tc.value) {
				t.Errorf("value = %v, want %v", v, tc.value)
			}
			if !got.Equal(tc.time) {
				t.Errorf("time = %v, want %v", got, tc.time)
			}
		})
	}
}

func TestReasonString(t *testing.T) {
	// The label values of surmise_samples_rejected_total in DEVELOPERS.md.
	want := map[Reason]string{
		ReasonNaN: "nan", ReasonRange: "range", ReasonParse: "parse",
		ReasonLate: "late", ReasonStale: "stale", ReasonUnknown: "unknown",
		ReasonOversize: "oversize", ReasonTime: "time",
	}
	if len(want) != int(numReasons) {
		t.Fatalf("%d reasons defined, the table names %d", numReasons, len(want))
	}
	for r, s := range want {
		if r.String() != s {
			t.Errorf("Reason(%d).String() = %q, want %q", r, r.String(), s)
		}
	}
	if s := Reason(200).String(); s != "unknown" {
		t.Errorf("out-of-range reason = %q, want unknown", s)
	}
	wrapped := fmt.Errorf("subject plant.tank.temp: %w", refuse(ReasonRange, "below 0"))
	if r := ReasonOf(wrapped); r != ReasonRange {
		t.Errorf("ReasonOf(wrapped) = %v, want range", r)
	}
	if r := ReasonOf(errors.New("other")); r != ReasonUnknown {
		t.Errorf("ReasonOf(plain error) = %v, want unknown", r)
	}
}

func TestDecodeSampleBareAllocatesNothing(t *testing.T) {
	recv := time.Now()
	for _, p := range []string{"61.2", " -4.125e-3\n", "1234567.891011121314151617"} {
		data := []byte(p)
		allocs := testing.AllocsPerRun(1000, func() {
			if _, _, err := DecodeSample(data, recv); err != nil {
				t.Fatal(err)
			}
		})
		if allocs != 0 {
			t.Errorf("DecodeSample(%q) allocates %v times, want 0", p, allocs)
		}
	}
}

func BenchmarkDecodeSample(b *testing.B) {
	recv := time.Now()
	for _, p := range []string{"61.2", `{"value": 61.2, "time": "2026-12-02T10:00:00.123Z"}`} {
		b.Run(strings.SplitN(p, ":", 2)[0], func(b *testing.B) {
			data := []byte(p)
			b.ReportAllocs()
			for b.Loop() {
				if _, _, err := DecodeSample(data, recv); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// FuzzDecodeSample checks properties that hold for any payload: no panic;
// an accepted value is finite; a refusal carries ReasonParse or ReasonNaN; an
// accepted bare number is what strconv.ParseFloat reads; and an accepted
// sample, written back as JSON, decodes to the same value and time.
func FuzzDecodeSample(f *testing.F) {
	for _, s := range []string{
		"61.2", " -4e-3\n", "NaN", "1e400", "0x1p3", "",
		`{"value": 61.2, "time": "2026-12-02T10:00:00.123Z"}`,
		`{"value": 1, "time": null, "x": [1, {"y": 2}]}`,
		`{"value": 1e400}`, `{"value": 1, "value": 2}`, `{"time": "2026-12-02T11:00:00+01:00", "value": -0}`,
	} {
		f.Add([]byte(s))
	}
	recv := time.Date(2026, 12, 2, 10, 0, 1, 0, time.UTC)
	f.Fuzz(func(t *testing.T, data []byte) {
		v, ts, err := DecodeSample(data, recv)
		if err != nil {
			if r := ReasonOf(err); r != ReasonParse && r != ReasonNaN {
				t.Fatalf("refusal with reason %v: %v", r, err)
			}
			return
		}
		if math.IsNaN(v) || math.IsInf(v, 0) {
			t.Fatalf("accepted a non-finite value %v", v)
		}
		if b := trimSpace(data); len(b) > 0 && b[0] != '{' {
			want, perr := strconv.ParseFloat(string(b), 64)
			if perr != nil || want != v {
				t.Fatalf("bare %q gave %v, strconv.ParseFloat gives %v, %v", b, v, want, perr)
			}
		}
		again, err := json.Marshal(map[string]any{"value": v, "time": ts.Format(time.RFC3339Nano)})
		if err != nil {
			t.Fatal(err)
		}
		v2, ts2, err := DecodeSample(again, recv)
		if err != nil || v2 != v || !ts2.Equal(ts) {
			t.Fatalf("round trip of %q via %s: %v %v %v, want %v %v", data, again, v2, ts2, err, v, ts)
		}
	})
}

func ExampleDecodeSample() {
	recv := time.Date(2026, 12, 2, 10, 0, 1, 0, time.UTC)
	for _, p := range []string{
		"61.2",
		`{"value": 58.9, "time": "2026-12-02T10:00:00.250Z"}`,
		"NaN",
	} {
		v, t, err := DecodeSample([]byte(p), recv)
		if err != nil {
			fmt.Printf("refused, reason %s\n", ReasonOf(err))
			continue
		}
		fmt.Println(v, t.Format(time.RFC3339Nano))
	}
	// Output:
	// 61.2 2026-12-02T10:00:01Z
	// 58.9 2026-12-02T10:00:00.25Z
	// refused, reason nan
}
