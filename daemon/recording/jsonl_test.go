package recording

import (
	"bufio"
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"strings"
	"testing"
	"time"
)

func TestWriterReadJSONLRoundTrip(t *testing.T) {
	t0 := time.Date(2024, 5, 6, 7, 8, 9, 123456789, time.FixedZone("CEST", 2*3600))
	msgs := []struct {
		recv    time.Time
		subject string
		payload []byte
	}{
		{t0, "plant.loop.t_tank", []byte("61.25")},
		{t0.Add(time.Millisecond), "plant.loop.t_hx", []byte(`{"value": 40.5, "time": "2024-05-06T05:08:09.1Z"}`)},
		{t0.Add(2 * time.Millisecond), "plant.loop.t_tank", []byte{}},
		{t0.Add(3 * time.Millisecond), "odd", []byte("quote \" backslash \\ newline \n tab \t nul \x00 del \x7f é \u2028")},
		{t0.Add(4 * time.Millisecond), "binary", []byte{0xff, 0xfe, 0x00, 'a'}},
		{t0.Add(5 * time.Millisecond), "plant.loop.t_tank", []byte(strings.Repeat("x", 100_000))}, // longer than the read buffer
	}
	var buf bytes.Buffer
	w := NewWriter(&buf)
	for _, m := range msgs {
		if err := w.Write(m.recv, m.subject, m.payload); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	if err := w.Write(t0, "late", nil); err == nil {
		t.Error("Write after Close did not fail")
	}

	// Every line is JSON that encoding/json reads to the same values: the
	// format is plain JSON Lines, readable by any tool.
	sc := bufio.NewScanner(bytes.NewReader(buf.Bytes()))
	sc.Buffer(nil, 1<<20)
	for i := 0; sc.Scan(); i++ {
		var v struct {
			Recv, Subject, Payload string
			PayloadBase64          []byte `json:"payload_base64"`
		}
		if err := json.Unmarshal(sc.Bytes(), &v); err != nil {
			t.Fatalf("line %d is not JSON: %v", i+1, err)
		}
		got := []byte(v.Payload)
		if v.PayloadBase64 != nil {
			got = v.PayloadBase64
		}
		if v.Subject != msgs[i].subject || !bytes.Equal(got, msgs[i].payload) {
			t.Errorf("line %d: encoding/json reads %q %q", i+1, v.Subject, got)
		}
		if rt, err := time.Parse(time.RFC3339Nano, v.Recv); err != nil || !rt.Equal(msgs[i].recv) {
			t.Errorf("line %d: recv %q", i+1, v.Recv)
		}
	}

	rec, err := ReadJSONL(bytes.NewReader(buf.Bytes()), "bus.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	if len(rec.Messages) != len(msgs) || len(rec.Issues) != 0 {
		t.Fatalf("read %d messages and issues %v, want %d and none", len(rec.Messages), rec.Issues, len(msgs))
	}
	for i, m := range rec.Messages {
		if !m.Recv.Equal(msgs[i].recv) || m.Recv.Location() != time.UTC || m.Subject != msgs[i].subject ||
			!bytes.Equal(m.Payload, msgs[i].payload) || m.Line != i+1 {
			t.Errorf("message %d = %v (line %d), want %v %s %q", i, m, m.Line, msgs[i].recv, msgs[i].subject, msgs[i].payload)
		}
		if m.Payload == nil {
			t.Errorf("message %d: nil payload", i)
		}
	}
	if got := strings.Join(rec.Subjects, " "); got != "plant.loop.t_tank plant.loop.t_hx odd binary" {
		t.Errorf("Subjects = %s", got)
	}
	if !rec.Start.Equal(msgs[0].recv) || !rec.End.Equal(msgs[len(msgs)-1].recv) {
		t.Errorf("span %v – %v", rec.Start, rec.End)
	}
	// Payloads must not share memory in a way that lets one overwrite another.
	rec.Messages[0].Payload = append(rec.Messages[0].Payload, "!!!"...)
	if string(rec.Messages[1].Payload) != string(msgs[1].payload) {
		t.Error("appending to one payload changed the next")
	}
}

func TestReadJSONL(t *testing.T) {
	const (
		l1 = `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload":"1"}`
		l2 = `{"recv":"2024-05-06T07:08:10Z","subject":"b","payload":"2"}`
		l3 = `{"recv":"2024-05-06T07:08:08Z","subject":"a","payload":"3"}`
	)
	tests := []struct {
		name     string
		in       string
		payloads string // concatenated, in the order returned
		issues   []Issue
	}{
		{"plain", l1 + "\n" + l2 + "\n", "12", nil},
		{"no final newline but complete", l1 + "\n" + l2, "12", nil},
		{"CRLF and blank lines", l1 + "\r\n\r\n  \n" + l2 + "\r\n", "12", nil},
		{"whitespace and member order", ` { "payload" : "1" , "subject":"a",` + "\t" + `"recv":"2024-05-06T09:08:09+02:00" } ` + "\n", "1", nil},
		{"escapes", `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload":"\u00e9\ud83d\ude00\/\"\\\b\f\n\r\t\ud800x"}` + "\n",
			"é😀/\"\\\b\f\n\r\t\uFFFDx", nil},
		{"base64", `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload_base64":"/w=="}` + "\n", "\xff", nil},
		{"truncated last line", l1 + "\n" + l2 + "\n" + `{"recv":"2024-05-06T07:08:11Z","subj`, "12",
			[]Issue{{Line: 3, Msg: "the last line is cut short"}}},
		{"truncated just before the closing brace", l1 + "\n" + strings.TrimSuffix(l2, "}"), "1",
			[]Issue{{Line: 2, Msg: "cut short"}}},
		{"receive time goes back", l1 + "\n" + l2 + "\n" + l3 + "\n", "312",
			[]Issue{{Line: 3, Column: "recv", Msg: "before 2024-05-06T07:08:10Z on line 2"}}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			rec, err := ReadJSONL(strings.NewReader(tc.in), "bus.jsonl")
			if err != nil {
				t.Fatal(err)
			}
			var got strings.Builder
			for _, m := range rec.Messages {
				got.Write(m.Payload)
			}
			if got.String() != tc.payloads {
				t.Errorf("payloads %q, want %q", got.String(), tc.payloads)
			}
			if len(rec.Issues) != len(tc.issues) {
				t.Fatalf("issues %v, want %v", rec.Issues, tc.issues)
			}
			for i, w := range tc.issues {
				g := rec.Issues[i]
				if g.Line != w.Line || g.Column != w.Column || !strings.Contains(g.Msg, w.Msg) {
					t.Errorf("issue %v, want %v", g, w)
				}
			}
		})
	}
}

func TestReadJSONLErrors(t *testing.T) {
	const ok = `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload":"1"}` + "\n"
	tests := []struct {
		name string
		line string // appended after one good line, with a newline, so it is line 2
		msg  string
	}{
		{"not an object", `[1]`, "want a JSON object"},
		{"unknown member", `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload":"1","x":"y"}`, `unknown member "x"`},
		{"repeated member", `{"recv":"2024-05-06T07:08:09Z","subject":"a","subject":"b","payload":"1"}`, "given twice"},
		{"number payload", `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload":1}`, "payload: want a string"},
		{"missing subject", `{"recv":"2024-05-06T07:08:09Z","payload":"1"}`, `no "subject"`},
		{"missing recv", `{"subject":"a","payload":"1"}`, `no "recv"`},
		{"missing payload", `{"recv":"2024-05-06T07:08:09Z","subject":"a"}`, `no "payload"`},
		{"both payloads", `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload":"1","payload_base64":"MQ=="}`, "both"},
		{"recv without zone", `{"recv":"2024-05-06T07:08:09","subject":"a","payload":"1"}`, "not an RFC 3339 time"},
		{"bad base64", `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload_base64":"!!"}`, "not standard base64"},
		{"trailing text", ok[:len(ok)-1] + ` x`, "text after the object"},
		{"raw control character", "{\"recv\":\"2024-05-06T07:08:09Z\",\"subject\":\"a\",\"payload\":\"\x01\"}", "control character"},
		{"bad escape", `{"recv":"2024-05-06T07:08:09Z","subject":"a","payload":"\x"}`, `bad escape \x`},
		{"invalid UTF-8", "{\"recv\":\"2024-05-06T07:08:09Z\",\"subject\":\"a\",\"payload\":\"\xff\"}", "not valid UTF-8"},
		{"truncated line that is not the last", `{"recv":"2024-05-06T07:08:09Z","subj`, "unterminated string"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := ReadJSONL(strings.NewReader(ok+tc.line+"\n"+ok), "bus.jsonl")
			var e *Error
			if !errors.As(err, &e) {
				t.Fatalf("error %v, want *Error", err)
			}
			if e.Line != 2 || !strings.Contains(err.Error(), tc.msg) || !strings.HasPrefix(err.Error(), "bus.jsonl:2: ") {
				t.Errorf("error %q, want bus.jsonl:2: … %q", err, tc.msg)
			}
		})
	}
	if _, err := ReadJSONL(strings.NewReader("\n\n"), "empty.jsonl"); err == nil || !strings.Contains(err.Error(), "no messages") {
		t.Errorf("empty recording: %v", err)
	}
}

// failAfter accepts n bytes, then fails every write.
type failAfter struct {
	n      int
	writes int
}

func (f *failAfter) Write(p []byte) (int, error) {
	f.writes++
	if len(p) > f.n {
		k := f.n
		f.n = 0
		return k, errors.New("disk full")
	}
	f.n -= len(p)
	return len(p), nil
}

func TestWriterOneWritePerLineAndStickyError(t *testing.T) {
	f := &failAfter{n: 100}
	w := NewWriter(f)
	t0 := time.Date(2024, 5, 6, 0, 0, 0, 0, time.UTC)
	if err := w.Write(t0, "a", []byte("1")); err != nil {
		t.Fatal(err)
	}
	if f.writes != 1 {
		t.Errorf("%d writes for one message, want 1", f.writes)
	}
	if err := w.Write(t0, "a", []byte(strings.Repeat("2", 100))); err == nil {
		t.Fatal("write to a full disk did not fail")
	}
	err := w.Write(t0, "a", []byte("3"))
	if err == nil || !strings.Contains(err.Error(), "disk full") {
		t.Errorf("write after a failure: %v, want the first error again", err)
	}
	if f.writes != 2 {
		t.Errorf("the writer kept writing after a failed write (%d writes)", f.writes)
	}
	if err := w.Close(); err == nil {
		t.Error("Close did not report the failed write")
	}
}

type flushCounter struct {
	bytes.Buffer
	flushes int
}

func (f *flushCounter) Flush() error { f.flushes++; return nil }

func TestWriterFlushesEachLine(t *testing.T) {
	f := &flushCounter{}
	w := NewWriter(f)
	for i := 0; i < 3; i++ {
		if err := w.Write(time.Unix(int64(i), 0), "a", []byte("1")); err != nil {
			t.Fatal(err)
		}
		if f.flushes != i+1 {
			t.Fatalf("after %d writes, %d flushes", i+1, f.flushes)
		}
	}
}

func TestWriterAllocatesNothing(t *testing.T) {
	w := NewWriter(io.Discard)
	t0 := time.Date(2024, 5, 6, 0, 0, 0, 0, time.UTC)
	p := []byte(`{"value": 61.25, "time": "2024-05-06T00:00:00.1Z"}`)
	allocs := testing.AllocsPerRun(1000, func() {
		if err := w.Write(t0, "plant.loop.t_tank", p); err != nil {
			t.Fatal(err)
		}
	})
	if allocs != 0 {
		t.Errorf("Write allocates %.1f times per message, want 0", allocs)
	}
}

func TestWriterConcurrentLinesStayWhole(t *testing.T) {
	var buf bytes.Buffer
	w := NewWriter(&buf)
	done := make(chan error)
	for g := 0; g < 4; g++ {
		go func() {
			var err error
			for i := 0; i < 200 && err == nil; i++ {
				err = w.Write(time.Unix(int64(i), 0), "s", []byte(strings.Repeat("p", 50)))
			}
			done <- err
		}()
	}
	for g := 0; g < 4; g++ {
		if err := <-done; err != nil {
			t.Fatal(err)
		}
	}
	rec, err := ReadJSONL(&buf, "c.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	if len(rec.Messages) != 800 {
		t.Errorf("%d messages, want 800", len(rec.Messages))
	}
}
