package recording

import (
	"bytes"
	"encoding/csv"
	"encoding/json"
	"errors"
	"math"
	"regexp"
	"strings"
	"testing"
	"time"
)

// FuzzReadCSV checks, for any input, that ReadCSV either fails with an
// *Error or returns samples in time order, all finite, with no signal twice
// at one time, and that every non-blank cell of the file (read again with
// encoding/csv) became a sample or is accounted for by an issue.
func FuzzReadCSV(f *testing.F) {
	f.Add("time,a,b\n2024-05-06T00:00:01Z,1,2\n2024-05-06T00:00:00Z,,x\n", byte(0), false)
	f.Add("t;a;b\n0,5;1;NaN\n0,5;2;\n1;3;4;5\n", byte(1), false)
	f.Add("time,a,zz,\n2024-10-27 02:30:00,1,2,3\n2024-10-27 02:10:00,1,,\n", byte(0), true)
	f.Add("\ufefftime,a\n1714979289.5,1e999\n1714979289.5,-0\n", byte(0), true)
	f.Add("a,\"ti\nme\"\n1,2\n\"3\n\",4\n", byte(0), false)
	berlin, err := time.LoadLocation("Europe/Berlin")
	if err != nil {
		f.Fatal(err)
	}
	f.Fuzz(func(t *testing.T, in string, comma byte, known bool) {
		opts := CSVOptions{Location: berlin}
		if comma%2 == 1 {
			opts.Comma, opts.DecimalComma = ';', true
		}
		if known {
			opts.Known = []string{"a", "b"}
		}
		rec, err := ReadCSV(strings.NewReader(in), "f.csv", opts)
		if err != nil {
			var e *Error
			if !errors.As(err, &e) {
				t.Fatalf("error %v is not an *Error", err)
			}
			return
		}
		type key struct {
			sig  string
			time int64
		}
		seen := map[key]bool{}
		type cell struct {
			sig  string
			line int
		}
		sampled := map[cell]bool{}
		for i, s := range rec.Samples {
			if i > 0 && s.Time.Before(rec.Samples[i-1].Time) {
				t.Fatalf("sample %d out of order", i)
			}
			if math.IsNaN(s.Value) || math.IsInf(s.Value, 0) {
				t.Fatalf("sample %d is %g", i, s.Value)
			}
			k := key{s.Signal, s.Time.UnixNano()}
			if seen[k] {
				t.Fatalf("signal %s twice at %v", s.Signal, s.Time)
			}
			seen[k] = true
			sampled[cell{s.Signal, s.Line}] = true
			if s.Time.Before(rec.Start) || s.Time.After(rec.End) {
				t.Fatalf("sample %d at %v outside %v – %v", i, s.Time, rec.Start, rec.End)
			}
		}
		issueAt := map[cell]bool{}
		for _, is := range rec.Issues {
			issueAt[cell{is.Column, is.Line}] = true
		}

		// Read the file again and account for every cell.
		cr := csv.NewReader(strings.NewReader(in))
		cr.Comma = ','
		if opts.Comma != 0 {
			cr.Comma = opts.Comma
		}
		cr.FieldsPerRecord = -1
		header, err := cr.Read()
		if err != nil {
			t.Fatalf("ReadCSV accepted a file encoding/csv cannot read: %v", err)
		}
		hline, _ := cr.FieldPos(0)
		names := make([]string, len(header))
		for i, h := range header {
			names[i] = strings.TrimSpace(h)
			if i == 0 {
				names[i] = strings.TrimSpace(strings.TrimPrefix(names[i], "\ufeff"))
			}
		}
		isKnown := func(n string) bool { return !known || n == "a" || n == "b" }
		for {
			row, err := cr.Read()
			if err != nil {
				break
			}
			line, _ := cr.FieldPos(0)
			for j := 1; j < len(row); j++ {
				if strings.TrimSpace(row[j]) == "" {
					continue
				}
				if j >= len(names) {
					if !issueAt[cell{"", line}] {
						t.Fatalf("line %d: a value beyond the header is not reported", line)
					}
					continue
				}
				n := names[j]
				if n == "" || !isKnown(n) {
					if !issueAt[cell{n, hline}] {
						t.Fatalf("column %q is skipped but not reported", n)
					}
					continue
				}
				cl, _ := cr.FieldPos(j)
				if !sampled[cell{n, line}] && !issueAt[cell{n, cl}] && !issueAt[cell{n, line}] {
					t.Fatalf("line %d column %q: %q is neither a sample nor an issue", line, n, row[j])
				}
			}
		}
	})
}

// FuzzReadJSONL checks that every line ReadJSONL accepts is JSON that
// encoding/json reads to the same subject and payload, and that writing the
// messages back and reading them again gives the same messages.
func FuzzReadJSONL(f *testing.F) {
	f.Add(`{"recv":"2024-05-06T07:08:09Z","subject":"a","payload":"1"}` + "\n")
	f.Add(`{"recv":"2024-05-06T07:08:09.5+02:00","subject":"a\u0041","payload_base64":"/w=="}` + "\n" +
		`{"recv":"2024-05-06T07:08:08Z","subject":"b","payload":"\ud83d\ude00\ud800"}`)
	f.Add(`{"payload":"", "subject":"", "recv":"2024-05-06t07:08:09z"}` + "\r\n\n" + `{"recv":"20`)
	f.Fuzz(func(t *testing.T, in string) {
		rec, err := ReadJSONL(strings.NewReader(in), "f.jsonl")
		if err != nil {
			var e *Error
			if !errors.As(err, &e) || e.Line < 0 {
				t.Fatalf("error %v is not an *Error with a line", err)
			}
			return
		}
		lines := strings.Split(in, "\n")
		for i, m := range rec.Messages {
			if i > 0 && m.Recv.Before(rec.Messages[i-1].Recv) {
				t.Fatalf("message %d out of order", i)
			}
			var v struct {
				Recv    string  `json:"recv"`
				Subject string  `json:"subject"`
				Payload *string `json:"payload"`
				B64     []byte  `json:"payload_base64"`
			}
			if err := json.Unmarshal([]byte(lines[m.Line-1]), &v); err != nil {
				t.Fatalf("line %d accepted, but encoding/json says %v", m.Line, err)
			}
			want := v.B64
			if v.Payload != nil {
				want = []byte(*v.Payload)
			}
			if v.Subject != m.Subject || !bytes.Equal(want, m.Payload) {
				t.Fatalf("line %d: read %q %q, encoding/json %q %q", m.Line, m.Subject, m.Payload, v.Subject, want)
			}
			if rt, err := time.Parse(time.RFC3339Nano, v.Recv); err == nil && !rt.Equal(m.Recv) {
				t.Fatalf("line %d: recv %v, time.Parse %v", m.Line, m.Recv, rt)
			}
		}
		var buf bytes.Buffer
		w := NewWriter(&buf)
		for _, m := range rec.Messages {
			if err := w.Write(m.Recv, m.Subject, m.Payload); err != nil {
				t.Fatal(err)
			}
		}
		again, err := ReadJSONL(&buf, "again.jsonl")
		if err != nil {
			t.Fatalf("reading what the Writer wrote: %v", err)
		}
		if len(again.Messages) != len(rec.Messages) {
			t.Fatalf("round trip: %d messages, want %d", len(again.Messages), len(rec.Messages))
		}
		for i, m := range again.Messages {
			o := rec.Messages[i]
			if !m.Recv.Equal(o.Recv) || m.Subject != o.Subject || !bytes.Equal(m.Payload, o.Payload) {
				t.Fatalf("round trip changed message %d: %v, want %v", i, m, o)
			}
		}
	})
}

// FuzzParseWall compares the hand-written date-time parser with
// time.Parse(time.RFC3339Nano): whatever both accept must be the same
// instant, and what time.Parse accepts parseWall must accept too, apart from
// what RFC 3339 §5.6 does not allow: one-digit fields, offset hours above
// 23 or offset minutes above 59.
func FuzzParseWall(f *testing.F) {
	f.Add("2024-05-06T07:08:09.123Z")
	f.Add("2024-02-29T23:59:59-08:00")
	f.Add("2024-05-06 07:08:09,5")
	// The date-time production of RFC 3339 §5.6.
	strictRFC3339 := regexp.MustCompile(`^[0-9]{4}-[0-9]{2}-[0-9]{2}[Tt][0-9]{2}:[0-9]{2}:[0-9]{2}(\.[0-9]+)?([Zz]|[+-][0-9]{2}:[0-9]{2})$`)
	f.Fuzz(func(t *testing.T, s string) {
		w, ok := parseWall(s)
		want, err := time.Parse(time.RFC3339Nano, s)
		if err == nil && !ok {
			if !strictRFC3339.MatchString(s) {
				return // time.Parse is laxer than RFC 3339 (one-digit hours, for one)
			}
			if n := len(s); s[n-1] != 'Z' && s[n-1] != 'z' && (s[n-5:n-3] > "23" || s[n-2:] > "59") {
				return // time.Parse takes offsets like +24:00 and +00:60, outside RFC 3339's ranges
			}
			t.Fatalf("%q: time.Parse accepts it, parseWall does not", s)
		}
		if err == nil && ok {
			got := time.Unix(w.seconds()-int64(w.offset), int64(w.nsec))
			if !got.Equal(want) {
				t.Fatalf("%q: parseWall %v, time.Parse %v", s, got.UTC(), want.UTC())
			}
		}
	})
}
