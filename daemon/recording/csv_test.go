package recording

import (
	"bytes"
	"errors"
	"io"
	"os"
	"strings"
	"testing"
	"time"
	_ "time/tzdata" // named zones without relying on the machine's zoneinfo
)

// smp is a compact expected sample: signal, value, time, line.
type smp struct {
	sig  string
	v    float64
	t    time.Time
	line int
}

// utc builds an expected instant with the standard library, independently
// of the parser under test.
func utc(y int, mo time.Month, d, h, mi, s, ns int) time.Time {
	return time.Date(y, mo, d, h, mi, s, ns, time.UTC)
}

func mustLoad(t *testing.T, name string) *time.Location {
	t.Helper()
	loc, err := time.LoadLocation(name)
	if err != nil {
		t.Fatalf("time.LoadLocation(%q): %v", name, err)
	}
	return loc
}

func TestReadCSV(t *testing.T) {
	berlin := mustLoad(t, "Europe/Berlin")
	newYork := mustLoad(t, "America/New_York")
	tests := []struct {
		name   string
		in     string
		opts   CSVOptions
		want   []smp
		format TimeFormat
		issues []Issue // Msg compared by substring
	}{
		{
			name: "RFC 3339 with blank cells",
			in: "time,T1,T2\n" +
				"2024-05-06T07:08:09Z,61.2,40\n" +
				"2024-05-06T07:08:09.5Z,,40.5\n" +
				"2024-05-06T07:08:10Z,61.3,\n",
			want: []smp{
				{"T1", 61.2, utc(2024, 5, 6, 7, 8, 9, 0), 2},
				{"T2", 40, utc(2024, 5, 6, 7, 8, 9, 0), 2},
				{"T2", 40.5, utc(2024, 5, 6, 7, 8, 9, 5e8), 3},
				{"T1", 61.3, utc(2024, 5, 6, 7, 8, 10, 0), 4},
			},
			format: TimeDateTime,
		},
		{
			// RFC 3339 §5.6: the offset is local minus UTC.
			name: "offsets, a space for the T, long fractions",
			in: "time,T1\n" +
				"2024-05-06 09:08:09.123456789123+02:00,1\n" +
				"\"2024-05-06T02:38:09,25-04:30\",2\n",
			want: []smp{
				{"T1", 1, utc(2024, 5, 6, 7, 8, 9, 123456789), 2},
				{"T1", 2, utc(2024, 5, 6, 7, 8, 9, 25e7), 3},
			},
			format: TimeDateTime,
		},
		{
			name: "zone-less times in a location",
			in: "Zeit;T1\n" +
				"2024-01-15 12:00:00;1,5\n" +
				"2024-07-15 12:00:00;-2,25\n",
			// Berlin is UTC+1 in winter and UTC+2 in summer (EU summer time,
			// Directive 2000/84/EC; common practice).
			opts: CSVOptions{Location: berlin, Comma: ';', DecimalComma: true},
			want: []smp{
				{"T1", 1.5, utc(2024, 1, 15, 11, 0, 0, 0), 2},
				{"T1", -2.25, utc(2024, 7, 15, 10, 0, 0, 0), 3},
			},
			format: TimeDateTime,
		},
		{
			// EU clocks go back at 01:00 UTC on the last Sunday of October
			// (Directive 2000/84/EC): 2024-10-27 02:00–02:59 local happens
			// twice, first at UTC+2, then at UTC+1.
			name: "the repeated hour when clocks go back, in row order",
			in: "time,T1\n" +
				"2024-10-27 01:59:00,1\n" +
				"2024-10-27 02:30:00,2\n" +
				"2024-10-27 02:59:00,3\n" +
				"2024-10-27 02:00:00,4\n" +
				"2024-10-27 02:30:00,5\n" +
				"2024-10-27 03:00:00,6\n",
			opts: CSVOptions{Location: berlin},
			want: []smp{
				{"T1", 1, utc(2024, 10, 26, 23, 59, 0, 0), 2},
				{"T1", 2, utc(2024, 10, 27, 0, 30, 0, 0), 3},
				{"T1", 3, utc(2024, 10, 27, 0, 59, 0, 0), 4},
				{"T1", 4, utc(2024, 10, 27, 1, 0, 0, 0), 5},
				{"T1", 5, utc(2024, 10, 27, 1, 30, 0, 0), 6},
				{"T1", 6, utc(2024, 10, 27, 2, 0, 0, 0), 7},
			},
			format: TimeDateTime,
			issues: []Issue{{Line: 3, Column: "time", Msg: "4 rows, lines 3 to 6, occur twice"}},
		},
		{
			// US clocks go back at 02:00 local on the first Sunday of
			// November (Energy Policy Act of 2005; common practice).
			name: "New York, a time zone west of UTC",
			in: "time,T1\n" +
				"2024-11-03 01:30:00,1\n" +
				"2024-11-03 01:30:00,2\n",
			opts: CSVOptions{Location: newYork},
			want: []smp{
				// Both rows resolve to the first 01:30 (EDT, UTC−4): the
				// earliest instant not before the previous row. They are then
				// duplicates, and the later row's value wins.
				{"T1", 2, utc(2024, 11, 3, 5, 30, 0, 0), 3},
			},
			format: TimeDateTime,
			issues: []Issue{
				{Line: 2, Column: "time", Msg: "occur twice"},
				{Line: 2, Column: "T1", Msg: "replaced by the one on line 3"},
				{Line: 3, Msg: "same time as line 2"},
			},
		},
		{
			name: "Unix seconds",
			in: "t,a\n" +
				"1714979289.25,1\n" +
				"1714979289.35,2\n",
			// 1714979289 s after 1970-01-01T00:00:00Z is 2024-05-06T07:08:09Z
			// (Python: datetime.fromtimestamp(1714979289, timezone.utc)).
			want: []smp{
				{"a", 1, utc(2024, 5, 6, 7, 8, 9, 25e7), 2},
				{"a", 2, utc(2024, 5, 6, 7, 8, 9, 35e7), 3},
			},
			format: TimeUnix,
		},
		{
			name: "seconds from an origin",
			in: "t,a\n" +
				"0,1\n" +
				"0.1,2\n" +
				"86400.05,3\n",
			opts: CSVOptions{Origin: utc(2024, 5, 6, 0, 0, 0, 0)},
			want: []smp{
				{"a", 1, utc(2024, 5, 6, 0, 0, 0, 0), 2},
				{"a", 2, utc(2024, 5, 6, 0, 0, 0, 1e8), 3},
				{"a", 3, utc(2024, 5, 7, 0, 0, 0, 5e7), 4},
			},
			format: TimeElapsed,
		},
		{
			name: "elapsed seconds with no origin count from 1970",
			in:   "t,a\n-1.5,1\n",
			want: []smp{{"a", 1, utc(1969, 12, 31, 23, 59, 58, 5e8), 2}},
			// -1.5 s before the epoch: closed form.
			format: TimeElapsed,
		},
		{
			name: "rows out of order are sorted stably",
			in: "time,a,b\n" +
				"2024-05-06T00:00:02Z,2,\n" +
				"2024-05-06T00:00:01Z,1,10\n" +
				"2024-05-06T00:00:03Z,3,\n",
			want: []smp{
				{"a", 1, utc(2024, 5, 6, 0, 0, 1, 0), 3},
				{"b", 10, utc(2024, 5, 6, 0, 0, 1, 0), 3},
				{"a", 2, utc(2024, 5, 6, 0, 0, 2, 0), 2},
				{"a", 3, utc(2024, 5, 6, 0, 0, 3, 0), 4},
			},
			format: TimeDateTime,
			issues: []Issue{{Line: 3, Column: "time", Msg: "is before 2024-05-06T00:00:02Z on line 2"}},
		},
		{
			name: "duplicate times: both rows kept, the later wins per signal",
			in: "time,a,b\n" +
				"2024-05-06T00:00:01Z,1,10\n" +
				"2024-05-06T00:00:01Z,2,\n" +
				"2024-05-06T00:00:02Z,3,30\n",
			want: []smp{
				{"b", 10, utc(2024, 5, 6, 0, 0, 1, 0), 2},
				{"a", 2, utc(2024, 5, 6, 0, 0, 1, 0), 3},
				{"a", 3, utc(2024, 5, 6, 0, 0, 2, 0), 4},
				{"b", 30, utc(2024, 5, 6, 0, 0, 2, 0), 4},
			},
			format: TimeDateTime,
			issues: []Issue{
				{Line: 2, Column: "a", Msg: "value 1 replaced by the one on line 3"},
				{Line: 3, Msg: "same time as line 2"},
			},
		},
		{
			name: "bad cells are skipped and reported",
			in: "time,a,b\n" +
				"2024-05-06T00:00:01Z,NaN,1\n" +
				"2024-05-06T00:00:02Z,Bad,+Inf\n" +
				"2024-05-06T00:00:03Z,1e999,2\n" +
				"2024-05-06T00:00:04Z,\" 4 \",3\n",
			want: []smp{
				{"b", 1, utc(2024, 5, 6, 0, 0, 1, 0), 2},
				{"b", 2, utc(2024, 5, 6, 0, 0, 3, 0), 4},
				{"a", 4, utc(2024, 5, 6, 0, 0, 4, 0), 5},
				{"b", 3, utc(2024, 5, 6, 0, 0, 4, 0), 5},
			},
			format: TimeDateTime,
			issues: []Issue{
				{Line: 2, Column: "a", Msg: `"NaN" is not a finite number`},
				{Line: 3, Column: "a", Msg: `"Bad" is not a number`},
				{Line: 3, Column: "b", Msg: `"+Inf" is not a finite number`},
				{Line: 4, Column: "a", Msg: `"1e999" is not a finite number`},
			},
		},
		{
			name: "unknown and unnamed columns are counted",
			in: "\ufefftime , a ,x,\n" +
				"2024-05-06T00:00:01Z,1,7,8\n" +
				"2024-05-06T00:00:02Z,2,,\n" +
				"2024-05-06T00:00:03Z,3,9,\n",
			opts: CSVOptions{Known: []string{"a", "b"}},
			want: []smp{
				{"a", 1, utc(2024, 5, 6, 0, 0, 1, 0), 2},
				{"a", 2, utc(2024, 5, 6, 0, 0, 2, 0), 3},
				{"a", 3, utc(2024, 5, 6, 0, 0, 3, 0), 4},
			},
			format: TimeDateTime,
			issues: []Issue{
				{Line: 1, Column: "x", Msg: "not a known signal; its 2 values were skipped"},
				{Line: 1, Column: "", Msg: "has no name; its 1 values were skipped"},
			},
		},
		{
			name: "ragged rows",
			in: "time,a,b\n" +
				"2024-05-06T00:00:01Z,1\n" +
				"2024-05-06T00:00:02Z,2,3,4,\n" +
				"2024-05-06T00:00:03Z,5,6,,\n",
			want: []smp{
				{"a", 1, utc(2024, 5, 6, 0, 0, 1, 0), 2},
				{"a", 2, utc(2024, 5, 6, 0, 0, 2, 0), 3},
				{"b", 3, utc(2024, 5, 6, 0, 0, 2, 0), 3},
				{"a", 5, utc(2024, 5, 6, 0, 0, 3, 0), 4},
				{"b", 6, utc(2024, 5, 6, 0, 0, 3, 0), 4},
			},
			format: TimeDateTime,
			issues: []Issue{
				{Line: 2, Msg: "the row has 2 fields and the header 3; the missing cells are blank"},
				{Line: 3, Msg: "1 values beyond the header were skipped"},
			},
		},
		{
			name: "quoted fields, one across two lines",
			in: "\"time\",\"T 1\"\n" +
				"2024-05-06T00:00:01Z,\"1\"\n" +
				"2024-05-06T00:00:02Z,\"bad\nvalue\"\n" +
				"2024-05-06T00:00:03Z,3\n",
			want: []smp{
				{"T 1", 1, utc(2024, 5, 6, 0, 0, 1, 0), 2},
				{"T 1", 3, utc(2024, 5, 6, 0, 0, 3, 0), 5},
			},
			format: TimeDateTime,
			issues: []Issue{{Line: 3, Column: "T 1", Msg: "is not a number"}},
		},
		{
			name: "a named time column that is not first, CRLF, blank rows",
			in: "a,stamp\r\n" +
				"1,2024-05-06T00:00:01Z\r\n" +
				"\r\n" +
				" , \r\n" +
				"2,2024-05-06T00:00:02Z\r\n",
			opts: CSVOptions{TimeColumn: "stamp"},
			want: []smp{
				{"a", 1, utc(2024, 5, 6, 0, 0, 1, 0), 2},
				{"a", 2, utc(2024, 5, 6, 0, 0, 2, 0), 5},
			},
			format: TimeDateTime,
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			rec, err := ReadCSV(strings.NewReader(tc.in), "test.csv", tc.opts)
			if err != nil {
				t.Fatalf("ReadCSV: %v", err)
			}
			if rec.TimeFormat != tc.format {
				t.Errorf("TimeFormat = %v, want %v", rec.TimeFormat, tc.format)
			}
			if len(rec.Samples) != len(tc.want) {
				t.Fatalf("got %d samples %v, want %d", len(rec.Samples), rec.Samples, len(tc.want))
			}
			for i, w := range tc.want {
				g := rec.Samples[i]
				if g.Signal != w.sig || g.Value != w.v || !g.Time.Equal(w.t) || g.Line != w.line {
					t.Errorf("sample %d = {%s %g %s line %d}, want {%s %g %s line %d}", i,
						g.Signal, g.Value, g.Time.UTC().Format(time.RFC3339Nano), g.Line,
						w.sig, w.v, w.t.Format(time.RFC3339Nano), w.line)
				}
			}
			if len(rec.Issues) != len(tc.issues) {
				t.Fatalf("got issues %v, want %v", rec.Issues, tc.issues)
			}
			for i, w := range tc.issues {
				g := rec.Issues[i]
				if g.Line != w.Line || g.Column != w.Column || !strings.Contains(g.Msg, w.Msg) {
					t.Errorf("issue %d = %v, want line %d column %q containing %q", i, g, w.Line, w.Column, w.Msg)
				}
			}
			if len(tc.want) > 0 {
				first, last := tc.want[0].t, tc.want[0].t
				for _, w := range tc.want {
					if w.t.Before(first) {
						first = w.t
					}
					if w.t.After(last) {
						last = w.t
					}
				}
				if !rec.Start.Equal(first) || !rec.End.Equal(last) {
					t.Errorf("span %v – %v, want %v – %v", rec.Start, rec.End, first, last)
				}
			}
		})
	}
}

func TestReadCSVReturnsTimesInTheLocation(t *testing.T) {
	berlin := mustLoad(t, "Europe/Berlin")
	rec, err := ReadCSV(strings.NewReader("time,a\n2024-05-06T07:08:09Z,1\n"), "x.csv", CSVOptions{Location: berlin})
	if err != nil {
		t.Fatal(err)
	}
	if got := rec.Samples[0].Time.Location(); got != berlin {
		t.Errorf("location %v, want Europe/Berlin", got)
	}
	rec, err = ReadCSV(strings.NewReader("time,a\n2024-05-06T07:08:09+02:00,1\n"), "x.csv", CSVOptions{})
	if err != nil {
		t.Fatal(err)
	}
	if got := rec.Samples[0].Time.Location(); got != time.UTC {
		t.Errorf("location %v, want UTC", got)
	}
}

func TestReadCSVSignals(t *testing.T) {
	rec, err := ReadCSV(strings.NewReader("b,time,a,c\n1,5,2,\n"), "x.csv",
		CSVOptions{TimeColumn: "time", Known: []string{"a", "b", "c"}})
	if err != nil {
		t.Fatal(err)
	}
	if got := strings.Join(rec.Signals, ","); got != "b,a,c" {
		t.Errorf("Signals = %s, want b,a,c (file order, time column left out)", got)
	}
}

func TestReadCSVErrors(t *testing.T) {
	berlin := mustLoad(t, "Europe/Berlin")
	tests := []struct {
		name   string
		in     string
		opts   CSVOptions
		line   int
		column string
		msg    string
	}{
		{"empty", "", CSVOptions{}, 0, "", "empty file"},
		{"header only", "time,a\n", CSVOptions{}, 1, "", "no data rows"},
		{"a column twice", "time,a,a\n", CSVOptions{}, 1, "a", "named twice"},
		{"no time column", "t,a\n", CSVOptions{TimeColumn: "time"}, 1, "time", `the header has "t", "a"`},
		{"unnamed first column", ",a\n1,2\n", CSVOptions{}, 1, "", "has no name"},
		{"stray quote", "time,a\n2024-05-06T00:00:01Z,1\n2024-05-06T00:00:02Z,\"2\n", CSVOptions{}, 3, "", "malformed CSV"},
		{"unparsable time", "time,a\n2024-05-06T00:00:01Z,1\n2024-05-06T00:00:0xZ,1\n", CSVOptions{}, 3, "time", "not a date and time"},
		{"not a time at all", "time,a\nyesterday,1\n", CSVOptions{}, 2, "time", "is not a time"},
		{"blank time", "time,a\n,1\n", CSVOptions{}, 2, "time", "no time"},
		{"day out of range", "time,a\n2023-02-29T00:00:00Z,1\n", CSVOptions{}, 2, "time", "is not a time"},
		{"format changes", "time,a\n2024-05-06T00:00:01Z,1\n1714979289,2\n", CSVOptions{}, 3, "time", "not a date and time"},
		{"no zone and no location", "time,a\n2024-05-06T00:00:01Z,1\n2024-05-06 00:00:02,1\n", CSVOptions{}, 3, "time", "has no zone"},
		// EU clocks go forward at 01:00 UTC on the last Sunday of March
		// (Directive 2000/84/EC): 2024-03-31 02:30 never happened in Berlin.
		{"a time skipped by DST", "time,a\n2024-03-31 01:59:59,1\n2024-03-31 02:30:00,2\n", CSVOptions{Location: berlin}, 3, "time", "does not exist in Europe/Berlin"},
		{"numbers then text", "t,a\n0.5,1\nnoon,2\n", CSVOptions{}, 3, "t", "not a number of seconds"},
		{"decimal comma needs another delimiter", "t,a\n", CSVOptions{DecimalComma: true}, 0, "", "decimal comma"},
		{"time column missing in a row", "a,t\n1\n", CSVOptions{TimeColumn: "t"}, 2, "t", "missing"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := ReadCSV(strings.NewReader(tc.in), "run.csv", tc.opts)
			var e *Error
			if !errors.As(err, &e) {
				t.Fatalf("error %v (%T), want *Error", err, err)
			}
			if e.Name != "run.csv" || e.Line != tc.line || e.Column != tc.column || !strings.Contains(err.Error(), tc.msg) {
				t.Errorf("error %q (line %d, column %q), want line %d, column %q, containing %q",
					err, e.Line, e.Column, tc.line, tc.column, tc.msg)
			}
		})
	}
}

func TestTimeFormatNames(t *testing.T) {
	for f := TimeAuto; f <= TimeElapsed; f++ {
		g, err := ParseTimeFormat(f.String())
		if err != nil || g != f {
			t.Errorf("ParseTimeFormat(%q) = %v, %v", f.String(), g, err)
		}
	}
	if _, err := ParseTimeFormat("iso"); err == nil {
		t.Error("ParseTimeFormat(iso) did not fail")
	}
}

// TestParseWallAgainstTimeParse checks the hand-written date-time parser
// against the standard library's RFC 3339 parser on a table of valid and
// invalid inputs.
func TestParseWallAgainstTimeParse(t *testing.T) {
	for _, s := range []string{
		"2024-05-06T07:08:09Z", "2024-05-06T07:08:09.000000001Z", "2024-12-31T23:59:59.999999999-23:59",
		"2000-02-29T00:00:00+00:00", "1900-02-28T12:00:00Z", "0001-01-01T00:00:00Z", "9999-12-31T23:59:59Z",
		"1969-12-31T23:59:59.5+05:30", "2024-05-06T24:00:00Z", "2024-13-06T07:08:09Z", "1900-02-29T00:00:00Z",
		"2024-05-06T07:60:09Z", "2024-05-06T07:08:60Z", "2024-05-06T07:08:09.Z",
		"2024-05-06T07:08:09+0200", "2024-5-06T07:08:09Z",
	} {
		want, werr := time.Parse(time.RFC3339Nano, s)
		w, ok := parseWall(s)
		if ok != (werr == nil) {
			t.Errorf("%q: parseWall ok=%v, time.Parse error %v", s, ok, werr)
			continue
		}
		if !ok {
			continue
		}
		got := time.Unix(w.seconds()-int64(w.offset), int64(w.nsec))
		if !got.Equal(want) {
			t.Errorf("%q: parseWall gives %v, time.Parse %v", s, got.UTC(), want.UTC())
		}
	}
}

// TestZoneResolverAgainstTimeDate compares, hour by hour over two years, the
// resolver's instants with time.Date's, which picks one instant for an
// ambiguous time and normalises a skipped one.
// RFC 3339 §5.6 limits time-hour to 00–23 and time-minute to 00–59, also
// in an offset; time.Parse accepts "+24:00" and "+00:60", parseWall does not.
func TestParseWallRefusesOffsetsOutOfRange(t *testing.T) {
	for _, s := range []string{"2024-05-06T07:08:09+24:00", "2024-05-06T07:08:09+00:60"} {
		if _, ok := parseWall(s); ok {
			t.Errorf("parseWall accepted %q", s)
		}
	}
}

func TestZoneResolverAgainstTimeDate(t *testing.T) {
	for _, name := range []string{"Europe/Berlin", "America/New_York", "Australia/Lord_Howe", "Pacific/Apia", "UTC"} {
		loc := mustLoad(t, name)
		z := zoneResolver{loc: loc}
		var dst [2]int64
		gaps, repeats := 0, 0
		start := utc(2011, 1, 1, 0, 0, 0, 0)
		for h := 0; h < 2*366*24*2; h++ {
			wallT := start.Add(time.Duration(h) * 30 * time.Minute) // wall clock, as if UTC
			n := z.resolve(&dst, wallT.Unix())
			ref := time.Date(wallT.Year(), wallT.Month(), wallT.Day(), wallT.Hour(), wallT.Minute(), 0, 0, loc)
			sameWall := ref.Format("2006-01-02 15:04") == wallT.Format("2006-01-02 15:04")
			switch n {
			case 0:
				gaps++
				if sameWall {
					t.Fatalf("%s %s: resolver says it does not exist, time.Date gives %v", name, wallT.Format("2006-01-02 15:04"), ref)
				}
			case 1, 2:
				if !sameWall {
					t.Fatalf("%s %s: resolver gives %d instants, time.Date says it does not exist", name, wallT.Format("2006-01-02 15:04"), n)
				}
				for i := 0; i < n; i++ {
					if got := time.Unix(dst[i], 0).In(loc).Format("2006-01-02 15:04"); got != wallT.Format("2006-01-02 15:04") {
						t.Fatalf("%s %s: instant %d shows %s", name, wallT.Format("2006-01-02 15:04"), i, got)
					}
				}
				if n == 2 {
					repeats++
					if dst[0] >= dst[1] {
						t.Fatalf("%s: instants not in order", name)
					}
				} else if dst[0] != ref.Unix() {
					t.Fatalf("%s %s: resolver %v, time.Date %v", name, wallT.Format("2006-01-02 15:04"), time.Unix(dst[0], 0).UTC(), ref.UTC())
				}
			}
		}
		// Each year with DST has one skipped and one repeated stretch; on a
		// half-hour grid an hour's shift is 2 points, Lord Howe's half hour
		// 1 point, and Samoa skipped all of 2011-12-30 (48 points; tz
		// database, common practice).
		t.Logf("%s: %d skipped and %d repeated half-hours", name, gaps, repeats)
		want := map[string][2]int{
			"Europe/Berlin": {2 * 2, 2 * 2}, "America/New_York": {2 * 2, 2 * 2},
			"Australia/Lord_Howe": {2, 2}, "UTC": {0, 0},
		}
		if w, ok := want[name]; ok && (gaps != w[0] || repeats != w[1]) {
			t.Errorf("%s: %d skipped, %d repeated over 2011–2012, want %d and %d", name, gaps, repeats, w[0], w[1])
		}
		if name == "Pacific/Apia" && gaps < 48 {
			t.Errorf("Pacific/Apia: %d skipped half-hours, want at least the 48 of 2011-12-30", gaps)
		}
	}
}

func TestParseSeconds(t *testing.T) {
	tests := []struct {
		in        string
		comma     bool
		sec, nsec int64
		ok        bool
	}{
		{"0", false, 0, 0, true},
		{"1714979289.25", false, 1714979289, 25e7, true},
		{"-1.5", false, -2, 5e8, true}, // −1.5 = −2 + 0.5 (floor and a positive fraction)
		{"-0.000000001", false, -1, 999999999, true},
		{"+3", false, 3, 0, true},
		{".5", false, 0, 5e8, true},
		{"5.", false, 5, 0, true},
		{"1,5", true, 1, 5e8, true},
		{"1,5", false, 0, 0, false},
		{"1.5e3", false, 1500, 0, true},
		{"2,5E1", true, 25, 0, true},
		{"NaN", false, 0, 0, false},
		{"1e400", false, 0, 0, false},
		{"", false, 0, 0, false},
		{"-", false, 0, 0, false},
		{"99999999999", false, 0, 0, false},
		{"1.2.3", false, 0, 0, false},
	}
	for _, tc := range tests {
		sec, nsec, ok := parseSeconds(tc.in, tc.comma)
		if ok != tc.ok || (ok && (sec != tc.sec || nsec != tc.nsec)) {
			t.Errorf("parseSeconds(%q, %v) = %d, %d, %v; want %d, %d, %v", tc.in, tc.comma, sec, nsec, ok, tc.sec, tc.nsec, tc.ok)
		}
	}
}

// TestReadCSVFromAFile reads the same export from a file (whose size the
// reader looks up to reserve its slice), from a reader of unknown size and
// with one line longer than the read buffer: all give the same samples.
func TestReadCSVFromAFile(t *testing.T) {
	data := historianCSV(3000)
	long := "2024-05-06T00:05:00.050Z," + strings.Repeat("9", 70_000) + ",1,2,3,4\n"
	data = append(data, long...)
	path := t.TempDir() + "/export.csv"
	if err := os.WriteFile(path, data, 0o600); err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	fromFile, err := ReadCSV(f, path, CSVOptions{})
	if err != nil {
		t.Fatal(err)
	}
	fromPipe, err := ReadCSV(io.MultiReader(bytes.NewReader(data)), "pipe", CSVOptions{})
	if err != nil {
		t.Fatal(err)
	}
	// 3000 rows of 5 values, then the long row's 4 short values; its
	// 70,000-digit number is 9.99…e69999, beyond float64: not finite.
	if len(fromFile.Samples) != 3000*5+4 || len(fromPipe.Samples) != len(fromFile.Samples) {
		t.Fatalf("%d and %d samples, want %d", len(fromFile.Samples), len(fromPipe.Samples), 3000*5+4)
	}
	for i := range fromFile.Samples {
		if fromFile.Samples[i] != fromPipe.Samples[i] {
			t.Fatalf("sample %d differs: %v and %v", i, fromFile.Samples[i], fromPipe.Samples[i])
		}
	}
	if len(fromFile.Issues) != 1 || fromFile.Issues[0].Line != 3002 || !strings.Contains(fromFile.Issues[0].Msg, "not a finite number") {
		t.Errorf("issues %v, want one on line 3002", fromFile.Issues)
	}
}
