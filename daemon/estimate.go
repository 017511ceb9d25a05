package daemon

import (
	"math"
	"strconv"
	"time"
	"unicode/utf8"

	"surmise/estimator"
)

// Estimate is what one tick publishes: the state in absolute units with its
// standard deviation, the outputs as predicted and measured, and the
// consistency figures. It is owned by the caller and reused from tick to
// tick (Engine.NewEstimate makes one that fits). Unknown numbers are NaN.
type Estimate struct {
	Estimator   string    // the estimator's name (the plant's)
	Instance    string    // the daemon instance that computed it; empty in a replay
	Time        time.Time // the tick's due time
	Seq         uint64    // tick sequence number, from 1
	Status      Status
	Gains       string // name of the gain set that produced it
	Fingerprint string // fingerprint of the model the gains were designed for
	Form        string // prediction, current or kalman

	States  []StateEstimate
	Inputs  []InputValue
	Outputs []OutputEstimate

	NIS     float64    // this tick's NIS; NaN when none was computed
	Dof     int        // number of outputs the NIS was computed with
	NISMean float64    // mean NIS over the window; NaN when empty
	NISBand [2]float64 // 95 % band on NISMean for the window's contents

	Used     estimator.Pattern // outputs the state was corrected with
	Outliers estimator.Pattern // outputs the gate rejected
	NoGain   bool              // fixed gains have no gain for the outputs present: predicted only

	// Diverged says what diverged when Status is StatusDiverged; the
	// estimate then carries no numbers (states, predicted outputs,
	// innovations and NIS are NaN). Reinitialised is true on the tick the
	// engine restarted the lane from the plant's initial condition after
	// DivergedHold diverged ticks.
	Diverged      string
	Reinitialised bool
}

// StateEstimate is one state of an Estimate.
type StateEstimate struct {
	Name, Unit string
	Value      float64 // x₀ + x̂
	Std        float64 // standard deviation, NaN when the gains give no covariance
}

// InputValue is the value an input was held at for this tick.
type InputValue struct {
	Name, Unit string
	Value      float64 // held sample, or the operating point if never received
	Age        float64 // seconds since the held sample's time; NaN if never received
	Stale      bool    // never received, or older than max_age
	// Late counts the samples of this input that arrived after their tick
	// had run and that this tick placed at their own time (re-running from
	// there); TooLate those it refused as late, beyond max_delay.
	Late, TooLate int
}

// OutputEstimate is one output of an Estimate.
type OutputEstimate struct {
	Name, Unit    string
	Measured      float64 // the sample used this tick; NaN when none
	Predicted     float64 // C·x̂(k|k−1) + D·u in absolute units
	Innovation    float64 // measured − predicted; NaN when not measured
	InnovationStd float64 // √S for this output; NaN when unknown
	Age           float64 // seconds since the newest sample's time; NaN if never received
	Used          bool    // corrected with
	Outlier       bool    // rejected by the gate
	Stale         bool    // a sample arrived for this tick but older than max_age
	Received      time.Time
	// Late counts the samples of this output that arrived after their tick
	// had run and that this tick fused at their own tick (re-running from
	// there); TooLate those it refused as late, beyond max_delay.
	Late, TooLate int

	// Fault indicators of the sensor (estimator.SensorWatch, over the
	// lane's own innovations): Bias is +1 (reads high) or −1 (reads low)
	// while the two-sided CUSUM of the normalised innovation is past its
	// decision interval, 0 otherwise; CUSUM is the larger of its two
	// statistics, in standard deviations. Stuck: repeated values, or
	// innovations far smaller than claimed. LockedOut: the gate refused
	// the last samples in a row. Dropout: the share of recent ticks
	// without a fresh sample.
	Bias             int
	CUSUM            float64
	Stuck, LockedOut bool
	Dropout          float64
}

// AppendJSON appends the estimate as one JSON object to dst and returns the
// extended slice. It allocates nothing when dst has room. NaN and infinite
// numbers are written as null. The object is
//
//	{"estimator", "instance", "time": RFC 3339 with fraction, UTC, "seq",
//	 "status", "gains", "fingerprint", "form",
//	 "states": {name: {"value", "std", "unit"}},
//	 "inputs": {name: {"value", "age", "stale", "unit"}},
//	 "outputs": {name: {"measured", "predicted", "innovation",
//	             "innovation_std", "age", "used", "outlier", "unit"}},
//	 "nis", "dof", "nis_mean", "nis_band": [lo, hi]}
//
// With the status "diverged" the object also has "diverged": what diverged
// (a sentence), and every number the filter produced (state values and std,
// predicted outputs, innovations, nis, nis_mean) is null: a diverged filter's
// numbers must not be mistaken for an estimate. "reinitialised": true marks
// the tick on which the engine restarted the filter from the plant's initial
// condition (DivergedHold ticks after it diverged).
func (est *Estimate) AppendJSON(dst []byte) []byte { return est.AppendJSONWith(dst, nil) }

// AppendJSONWith is AppendJSON with the numbers' text kept in c from one
// call to the next: a number equal to the one written at the same place the
// time before (a settled standard deviation, the NIS band, a held input) is
// copied instead of formatted again. The output is the same byte for byte;
// c nil formats every number. Give each stream of estimates (an estimator's
// active or shadow estimates) its own cache.
func (est *Estimate) AppendJSONWith(dst []byte, c *NumberCache) []byte {
	if c != nil {
		c.next = 0
	}
	dst = append(dst, `{"estimator":`...)
	dst = appendString(dst, est.Estimator)
	dst = append(dst, `,"instance":`...)
	dst = appendString(dst, est.Instance)
	dst = append(dst, `,"time":"`...)
	dst = est.Time.UTC().AppendFormat(dst, time.RFC3339Nano)
	dst = append(dst, `","seq":`...)
	dst = strconv.AppendUint(dst, est.Seq, 10)
	dst = append(dst, `,"status":`...)
	dst = appendString(dst, est.Status.String())
	if est.Status == StatusDiverged {
		dst = append(dst, `,"diverged":`...)
		dst = appendString(dst, est.Diverged)
	}
	if est.Reinitialised {
		dst = append(dst, `,"reinitialised":true`...)
	}
	dst = append(dst, `,"gains":`...)
	dst = appendString(dst, est.Gains)
	dst = append(dst, `,"fingerprint":`...)
	dst = appendString(dst, est.Fingerprint)
	dst = append(dst, `,"form":`...)
	dst = appendString(dst, est.Form)

	dst = append(dst, `,"states":{`...)
	for i := range est.States {
		s := &est.States[i]
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = appendString(dst, s.Name)
		dst = append(dst, `:{"value":`...)
		dst = c.appendFloat(dst, s.Value)
		dst = append(dst, `,"std":`...)
		dst = c.appendFloat(dst, s.Std)
		dst = append(dst, `,"unit":`...)
		dst = appendString(dst, s.Unit)
		dst = append(dst, '}')
	}
	dst = append(dst, `},"inputs":{`...)
	for i := range est.Inputs {
		in := &est.Inputs[i]
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = appendString(dst, in.Name)
		dst = append(dst, `:{"value":`...)
		dst = c.appendFloat(dst, in.Value)
		dst = append(dst, `,"age":`...)
		dst = c.appendFloat(dst, in.Age)
		dst = append(dst, `,"stale":`...)
		dst = strconv.AppendBool(dst, in.Stale)
		dst = append(dst, `,"unit":`...)
		dst = appendString(dst, in.Unit)
		dst = append(dst, '}')
	}
	dst = append(dst, `},"outputs":{`...)
	for i := range est.Outputs {
		o := &est.Outputs[i]
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = appendString(dst, o.Name)
		dst = append(dst, `:{"measured":`...)
		dst = c.appendFloat(dst, o.Measured)
		dst = append(dst, `,"predicted":`...)
		dst = c.appendFloat(dst, o.Predicted)
		dst = append(dst, `,"innovation":`...)
		dst = c.appendFloat(dst, o.Innovation)
		dst = append(dst, `,"innovation_std":`...)
		dst = c.appendFloat(dst, o.InnovationStd)
		dst = append(dst, `,"age":`...)
		dst = c.appendFloat(dst, o.Age)
		dst = append(dst, `,"used":`...)
		dst = strconv.AppendBool(dst, o.Used)
		dst = append(dst, `,"outlier":`...)
		dst = strconv.AppendBool(dst, o.Outlier)
		dst = append(dst, `,"unit":`...)
		dst = appendString(dst, o.Unit)
		dst = append(dst, '}')
	}
	dst = append(dst, `},"nis":`...)
	dst = c.appendFloat(dst, est.NIS)
	dst = append(dst, `,"dof":`...)
	dst = strconv.AppendInt(dst, int64(est.Dof), 10)
	dst = append(dst, `,"nis_mean":`...)
	dst = c.appendFloat(dst, est.NISMean)
	dst = append(dst, `,"nis_band":[`...)
	dst = c.appendFloat(dst, est.NISBand[0])
	dst = append(dst, ',')
	dst = c.appendFloat(dst, est.NISBand[1])
	dst = append(dst, "]}"...)
	return dst
}

// appendFloat writes v as a JSON number, or null when it is NaN or infinite.
func appendFloat(dst []byte, v float64) []byte {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return append(dst, "null"...)
	}
	return strconv.AppendFloat(dst, v, 'g', -1, 64)
}

// NumberCache keeps the text of the numbers of a stream of estimates for
// [Estimate.AppendJSONWith]. The zero value is ready; it grows to the
// estimates' size on first use and allocates nothing after. It is not safe
// for concurrent use.
type NumberCache struct {
	next int      // place of the next number in this call
	bits []uint64 // per place: the number last written there
	n    []uint8  // per place: the length of its text, 0 when none yet
	text []byte   // per place: numberWidth bytes holding the text
}

// numberWidth is room for the longest text appendFloat writes
// ("-2.2250738585072014e-308").
const numberWidth = 24

// appendFloat is the package's appendFloat, through the cache when c is not
// nil.
func (c *NumberCache) appendFloat(dst []byte, v float64) []byte {
	if c == nil {
		return appendFloat(dst, v)
	}
	i := c.next
	c.next++
	if i == len(c.bits) {
		c.bits = append(c.bits, 0)
		c.n = append(c.n, 0)
		c.text = append(c.text, make([]byte, numberWidth)...)
	}
	slot := c.text[i*numberWidth : (i+1)*numberWidth : (i+1)*numberWidth]
	b := math.Float64bits(v)
	if c.n[i] == 0 || c.bits[i] != b {
		t := appendFloat(slot[:0], v)
		if len(t) > numberWidth { // cannot happen; written directly if it did
			c.n[i] = 0
			return append(dst, t...)
		}
		c.bits[i], c.n[i] = b, uint8(len(t))
	}
	return append(dst, slot[:c.n[i]]...)
}

const hexDigits = "0123456789abcdef"

// appendString writes s as a JSON string: quotes, backslashes and control
// characters escaped, invalid UTF-8 replaced by U+FFFD, everything else as is.
func appendString(dst []byte, s string) []byte {
	dst = append(dst, '"')
	// The names and units of a plant are mostly plain ASCII: copy the
	// plain prefix at once.
	plain := 0
	for plain < len(s) {
		c := s[plain]
		if c < 0x20 || c == '"' || c == '\\' || c >= utf8.RuneSelf {
			break
		}
		plain++
	}
	dst = append(dst, s[:plain]...)
	for i := plain; i < len(s); {
		c := s[i]
		if c < utf8.RuneSelf {
			switch {
			case c == '"' || c == '\\':
				dst = append(dst, '\\', c)
			case c == '\n':
				dst = append(dst, '\\', 'n')
			case c == '\r':
				dst = append(dst, '\\', 'r')
			case c == '\t':
				dst = append(dst, '\\', 't')
			case c < 0x20:
				dst = append(dst, '\\', 'u', '0', '0', hexDigits[c>>4], hexDigits[c&0xf])
			default:
				dst = append(dst, c)
			}
			i++
			continue
		}
		r, size := utf8.DecodeRuneInString(s[i:])
		if r == utf8.RuneError && size == 1 {
			dst = append(dst, `\ufffd`...)
		} else {
			dst = append(dst, s[i:i+size]...)
		}
		i += size
	}
	return append(dst, '"')
}
