package daemon

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"time"
)

// Reason says why a sample was refused. Its String is the value of the
// `reason` label of surmise_samples_rejected_total. The zero value is
// ReasonUnknown.
type Reason uint8

// The reasons a sample is refused. DecodeSample returns ReasonParse and
// ReasonNaN; the others are the tick engine's.
const (
	ReasonUnknown  Reason = iota // "unknown": refused for a reason not listed here
	ReasonNaN                    // "nan": not a finite number (NaN, ±Inf, or beyond float64)
	ReasonRange                  // "range": outside the signal's valid range
	ReasonParse                  // "parse": not a number, or not a payload of the accepted forms
	ReasonLate                   // "late": its timestamp is not newer than the signal's last sample used
	ReasonStale                  // "stale": its timestamp is older than the signal's max_age (on arrival, or when its tick comes)
	ReasonOversize               // "oversize": a payload longer than MaxSampleBytes
	ReasonTime                   // "time": a timestamp before 1970, which no plant's clock gives
	numReasons
)

var reasonNames = [numReasons]string{
	ReasonUnknown:  "unknown",
	ReasonNaN:      "nan",
	ReasonRange:    "range",
	ReasonParse:    "parse",
	ReasonLate:     "late",
	ReasonStale:    "stale",
	ReasonOversize: "oversize",
	ReasonTime:     "time",
}

// MaxSampleBytes is the longest sample payload accepted: a number with its
// time is well under a hundred bytes, and a longer payload is a mistake of
// the publisher (the wrong subject, say), refused without parsing.
const MaxSampleBytes = 4 << 10

// epoch is the earliest sample time accepted.
var epoch = time.Unix(0, 0)

// String returns the label value of r ("nan", "range", …); a value outside
// the enumeration is "unknown".
func (r Reason) String() string {
	if r >= numReasons {
		return reasonNames[ReasonUnknown]
	}
	return reasonNames[r]
}

// SampleError is a refused sample: a reason for the metrics and the detail
// for the log.
type SampleError struct {
	Reason Reason
	Err    error
}

// Error returns "sample refused (reason): detail".
func (e *SampleError) Error() string {
	return "sample refused (" + e.Reason.String() + "): " + e.Err.Error()
}

// Unwrap returns the detail.
func (e *SampleError) Unwrap() error { return e.Err }

// ReasonOf returns the reason carried by err (anywhere in its chain), or
// ReasonUnknown if it carries none.
func ReasonOf(err error) Reason {
	if se, ok := errors.AsType[*SampleError](err); ok {
		return se.Reason
	}
	return ReasonUnknown
}

func refuse(r Reason, format string, args ...any) error {
	return &SampleError{Reason: r, Err: fmt.Errorf(format, args...)}
}

// maxQuoted bounds how much of a refused payload an error message repeats.
const maxQuoted = 64

func quote(b []byte) string {
	if len(b) > maxQuoted {
		return strconv.Quote(string(b[:maxQuoted])) + "…"
	}
	return strconv.Quote(string(b))
}

// DecodeSample decodes one sample payload from the bus. Two forms are
// accepted:
//
//   - a bare decimal number in ASCII, with optional surrounding whitespace:
//     "61.2", " -4e-3\n". Hexadecimal, underscores, a leading "0x" and other
//     forms strconv.ParseFloat also knows are refused.
//   - a JSON object {"value": 61.2, "time": "2026-12-02T10:00:00.123Z"}:
//     value a JSON number, time a string in RFC 3339 (a fraction of a second
//     is optional, the zone is required). The time may be absent or null.
//     Keys are matched exactly (case matters); a repeated "value" or "time"
//     is refused as ambiguous. Other fields are ignored, so that gateways
//     which add their own (a unit, a tag id) need no adapter; note that a
//     quality flag in such a field is therefore not interpreted.
//
// The sample time is the payload's time when it has one, otherwise recv
// (the receive time, which carries a monotonic reading; a parsed time does
// not). A payload that is not one of these forms is refused with
// ReasonParse; a number that is NaN, infinite or beyond the range of a
// float64 with ReasonNaN. Errors are *SampleError values.
//
// The bare-number path allocates nothing for numbers of up to 32 bytes.
func DecodeSample(data []byte, recv time.Time) (value float64, t time.Time, err error) {
	if len(data) > MaxSampleBytes {
		return 0, time.Time{}, refuse(ReasonOversize, "payload of %d bytes, more than %d", len(data), MaxSampleBytes)
	}
	b := trimSpace(data)
	if len(b) > 0 && b[0] == '{' {
		return decodeJSONSample(b, recv)
	}
	v, err := parseBare(b)
	if err != nil {
		return 0, time.Time{}, err
	}
	return v, recv, nil
}

// parseBare parses a decimal number, refusing non-finite values.
func parseBare(b []byte) (float64, error) {
	if !isDecimal(b) {
		if isNonFiniteWord(b) {
			return 0, refuse(ReasonNaN, "%s is not a finite number", quote(b))
		}
		return 0, refuse(ReasonParse, "%s is not a decimal number", quote(b))
	}
	return parseDecimal(b)
}

// parseDecimal parses b, already checked to be a decimal number.
func parseDecimal(b []byte) (float64, error) {
	v, err := strconv.ParseFloat(string(b), 64) // no allocation: a non-escaping conversion of ≤ 32 bytes
	if err != nil || math.IsInf(v, 0) {
		// The grammar is checked, so the only error is a value beyond
		// ±1.8e308, which ParseFloat returns as ±Inf.
		return 0, refuse(ReasonNaN, "%s is beyond the range of a float64", quote(b))
	}
	return v, nil
}

// isDecimal reports whether b is [+-]? (d+ (. d*)? | . d+) ([eE] [+-]? d+)?
func isDecimal(b []byte) bool {
	i := 0
	if i < len(b) && (b[i] == '+' || b[i] == '-') {
		i++
	}
	intDigits := digits(b[i:])
	i += intDigits
	fracDigits := 0
	if i < len(b) && b[i] == '.' {
		i++
		fracDigits = digits(b[i:])
		i += fracDigits
	}
	if intDigits == 0 && fracDigits == 0 {
		return false
	}
	if i < len(b) && (b[i] == 'e' || b[i] == 'E') {
		i++
		if i < len(b) && (b[i] == '+' || b[i] == '-') {
			i++
		}
		n := digits(b[i:])
		if n == 0 {
			return false
		}
		i += n
	}
	return i == len(b)
}

func digits(b []byte) int {
	n := 0
	for n < len(b) && '0' <= b[n] && b[n] <= '9' {
		n++
	}
	return n
}

// isNonFiniteWord reports whether b spells NaN or an infinity the way
// sensors and programs print them: nan, inf, infinity, with an optional sign,
// in any case.
func isNonFiniteWord(b []byte) bool {
	if len(b) > 0 && (b[0] == '+' || b[0] == '-') {
		b = b[1:]
	}
	for _, w := range [...]string{"nan", "inf", "infinity"} {
		if len(b) == len(w) && asciiEqualFold(b, w) {
			return true
		}
	}
	return false
}

func asciiEqualFold(b []byte, lower string) bool {
	for i := range b {
		c := b[i]
		if 'A' <= c && c <= 'Z' {
			c += 'a' - 'A'
		}
		if c != lower[i] {
			return false
		}
	}
	return true
}

func trimSpace(b []byte) []byte {
	isSpace := func(c byte) bool {
		return c == ' ' || c == '\t' || c == '\n' || c == '\r' || c == '\v' || c == '\f'
	}
	for len(b) > 0 && isSpace(b[0]) {
		b = b[1:]
	}
	for len(b) > 0 && isSpace(b[len(b)-1]) {
		b = b[:len(b)-1]
	}
	return b
}

// decodeJSONSample decodes the JSON form; b starts with '{'.
func decodeJSONSample(b []byte, recv time.Time) (float64, time.Time, error) {
	fail := func(format string, args ...any) (float64, time.Time, error) {
		return 0, time.Time{}, refuse(ReasonParse, "JSON payload %s: "+format, append([]any{quote(b)}, args...)...)
	}
	dec := json.NewDecoder(bytes.NewReader(b))
	dec.UseNumber()
	if _, err := dec.Token(); err != nil { // the '{'
		return fail("%v", err)
	}
	var (
		num              json.Number
		stamp            *string
		hasValue, hasTim bool
	)
	for dec.More() {
		tok, err := dec.Token()
		if err != nil {
			return fail("%v", err)
		}
		key, _ := tok.(string) // an object key is always a string
		switch key {
		case "value":
			if hasValue {
				return fail(`"value" given twice`)
			}
			hasValue = true
			tok, err := dec.Token()
			if err != nil {
				return fail("%v", err)
			}
			n, ok := tok.(json.Number)
			if !ok {
				return fail(`"value" is %s, want a number`, jsonKind(tok))
			}
			num = n
		case "time":
			if hasTim {
				return fail(`"time" given twice`)
			}
			hasTim = true
			tok, err := dec.Token()
			if err != nil {
				return fail("%v", err)
			}
			switch v := tok.(type) {
			case nil: // null: no time, use the receive time
			case string:
				stamp = &v
			default:
				return fail(`"time" is %s, want an RFC 3339 string`, jsonKind(tok))
			}
		default:
			var skip json.RawMessage
			if err := dec.Decode(&skip); err != nil {
				return fail("%v", err)
			}
		}
	}
	if _, err := dec.Token(); err != nil { // the '}'
		return fail("%v", err)
	}
	if _, err := dec.Token(); err != io.EOF {
		return fail("data after the object")
	}
	if !hasValue {
		return fail(`no "value"`)
	}
	v, err := parseDecimal([]byte(num)) // encoding/json has checked the grammar
	if err != nil {
		return 0, time.Time{}, err
	}
	t := recv
	if stamp != nil {
		t, err = time.Parse(time.RFC3339Nano, *stamp)
		if err != nil {
			return fail(`"time": %v`, err)
		}
		if t.Before(epoch) {
			return 0, time.Time{}, refuse(ReasonTime, "JSON payload %s: \"time\" %s is before 1970", quote(b), *stamp)
		}
	}
	return v, t, nil
}

// jsonKind names the JSON type of a token for an error message.
func jsonKind(tok json.Token) string {
	switch v := tok.(type) {
	case nil:
		return "null"
	case bool:
		return "a boolean"
	case string:
		return "a string"
	case json.Delim:
		if v == '{' {
			return "an object"
		}
		return "an array"
	}
	return fmt.Sprintf("%T", tok)
}
