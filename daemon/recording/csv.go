package recording

import (
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"math"
	"slices"
	"strconv"
	"strings"
	"time"
)

// TimeFormat says how the time column of a CSV recording is written.
type TimeFormat int

const (
	// TimeAuto detects the format from the first data row: a calendar date
	// and time is TimeDateTime; a number is TimeUnix when it is at least 1e8
	// (1973-03-03) and TimeElapsed below that. The detected format then
	// holds for every row.
	TimeAuto TimeFormat = iota
	// TimeDateTime is "2006-01-02T15:04:05.999Z07:00" (RFC 3339, any
	// number of fraction digits, 'T' or a space between date and time) or
	// the same without a zone, read in CSVOptions.Location.
	TimeDateTime
	// TimeUnix is seconds since 1970-01-01 UTC, with a fraction.
	TimeUnix
	// TimeElapsed is seconds since CSVOptions.Origin, with a fraction.
	TimeElapsed
)

// String returns the format's name: auto, datetime, unix or elapsed.
func (f TimeFormat) String() string {
	switch f {
	case TimeAuto:
		return "auto"
	case TimeDateTime:
		return "datetime"
	case TimeUnix:
		return "unix"
	case TimeElapsed:
		return "elapsed"
	}
	return "TimeFormat(" + strconv.Itoa(int(f)) + ")"
}

// ParseTimeFormat returns the TimeFormat named by s, as String writes it.
func ParseTimeFormat(s string) (TimeFormat, error) {
	for f := TimeAuto; f <= TimeElapsed; f++ {
		if s == f.String() {
			return f, nil
		}
	}
	return 0, fmt.Errorf("time format %q: want auto, datetime, unix or elapsed", s)
}

// CSVOptions tells ReadCSV how to read a file. The zero value reads a
// comma-separated file whose first column is the time, in any format that
// TimeAuto recognises, with every other column a signal.
type CSVOptions struct {
	// TimeColumn is the header of the time column; "" means the first column.
	TimeColumn string

	// TimeFormat is the format of the time column; zero means TimeAuto.
	TimeFormat TimeFormat

	// Location is the zone of date-times written without a zone, and the
	// zone of the times returned. nil means UTC for the times returned, and
	// makes a date-time without a zone an error.
	Location *time.Location

	// Origin is the instant that TimeElapsed counts from; the zero value
	// means 1970-01-01T00:00:00Z.
	Origin time.Time

	// Known, when not empty, lists the signal names that may appear as
	// columns. The cells of any other column are skipped, with one Issue per
	// column that says how many values it held.
	Known []string

	// Comma is the field delimiter; 0 means ','.
	Comma rune

	// DecimalComma reads numbers (values and numeric times) with ',' as the
	// decimal separator, as spreadsheets in many locales export them. It
	// needs a Comma other than ','. A '.' in a number is then an error, as
	// it would be a thousands separator that cannot be told apart.
	DecimalComma bool
}

// Recording is a CSV recording as read by ReadCSV.
type Recording struct {
	Name    string   // the name given to ReadCSV
	Samples []Sample // in time order; samples of one row stay in column order
	Signals []string // the signal columns read, in the file's order

	// Start and End are the times of the first and last data rows.
	Start, End time.Time

	// TimeFormat is the format of the time column, as given or detected.
	TimeFormat TimeFormat

	// Issues are the problems that did not stop the reading, in line order.
	Issues []Issue
}

// ReadCSV reads a historian-style CSV recording: a header row naming a time
// column and one column per signal, then one row per time, with a blank
// cell where a signal has no sample at that time. name identifies the
// source in errors and issues. See the package documentation for which
// problems are errors and which are issues.
func ReadCSV(r io.Reader, name string, opts CSVOptions) (*Recording, error) {
	p, err := newCSVParser(name, opts)
	if err != nil {
		return nil, err
	}
	return p.read(r)
}

// column is what the parser knows of one column of the header.
type column struct {
	name    string
	skip    bool // unknown or unnamed: cells are counted, not read
	skipped int  // non-blank cells skipped
	line    int  // header line, for the issue
}

type csvParser struct {
	name string
	opts CSVOptions
	out  *time.Location // zone of returned times
	zr   zoneResolver

	cols    []column
	timeIdx int
	format  TimeFormat
	rec     *Recording

	// State of the rows read so far.
	rows      int
	prev      time.Time
	prevLine  int
	sorted    bool
	amb       ambiguousRun
	resolvBuf [2]int64
	scratch   []byte
	samples   []Sample // grows to the result
}

// ambiguousRun collects consecutive rows whose local time falls in a
// repeated stretch, to report them as one issue.
type ambiguousRun struct {
	first, last, n int
}

func newCSVParser(name string, opts CSVOptions) (*csvParser, error) {
	if opts.Comma == 0 {
		opts.Comma = ','
	}
	if opts.DecimalComma && opts.Comma == ',' {
		return nil, &Error{Name: name, Msg: "a decimal comma needs a field delimiter other than ','"}
	}
	if opts.TimeFormat < TimeAuto || opts.TimeFormat > TimeElapsed {
		return nil, &Error{Name: name, Msg: "unknown time format " + opts.TimeFormat.String()}
	}
	if opts.Origin.IsZero() {
		opts.Origin = time.Unix(0, 0)
	}
	p := &csvParser{name: name, opts: opts, out: opts.Location, sorted: true}
	if p.out == nil {
		p.out = time.UTC
	}
	if opts.Location != nil {
		p.zr.loc = opts.Location
	}
	return p, nil
}

func (p *csvParser) read(r io.Reader) (*Recording, error) {
	size := inputSize(r)
	rr := newRowReader(r, p.opts.Comma)
	p.rec = &Recording{Name: p.name}

	hf, hl, err := rr.next()
	if err == io.EOF {
		return nil, &Error{Name: p.name, Msg: "empty file: want a header row naming the columns"}
	}
	if err != nil {
		return nil, p.csvError(err)
	}
	header := make([]string, len(hf))
	for i, f := range hf {
		header[i] = string(f)
	}
	hline := hl[0]
	if err := p.header(header, hline); err != nil {
		return nil, err
	}
	for {
		row, lines, err := rr.next()
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, p.csvError(err)
		}
		if err := p.row(row, lines); err != nil {
			return nil, err
		}
		if p.rows == reserveAfter && size > 0 {
			p.reserve(size, rr.offset)
		}
	}
	p.flushAmbiguous()
	if p.rows == 0 {
		return nil, &Error{Name: p.name, Line: hline, Msg: "no data rows after the header"}
	}
	for _, c := range p.cols {
		if c.skipped > 0 {
			why := "is not a known signal"
			if c.name == "" {
				why = "has no name"
			}
			p.issue(c.line, c.name, fmt.Sprintf("column %s; its %d values were skipped", why, c.skipped))
		}
	}
	if !p.sorted {
		slices.SortStableFunc(p.samples, func(a, b Sample) int { return a.Time.Compare(b.Time) })
	}
	p.duplicates()
	p.rec.Samples = p.samples
	p.rec.TimeFormat = p.format
	slices.SortStableFunc(p.rec.Issues, func(a, b Issue) int { return a.Line - b.Line })
	return p.rec, nil
}

// reserveAfter is the number of rows read before the parser estimates the
// size of the whole file's Sample slice from the bytes they took.
const reserveAfter = 512

// inputSize returns the number of bytes r holds, when r can tell: a
// bytes.Reader, strings.Reader or bytes.Buffer by Len, an os.File by Stat.
// It returns 0 when it cannot tell.
func inputSize(r io.Reader) int64 {
	switch v := r.(type) {
	case interface{ Len() int }:
		return int64(v.Len())
	case interface{ Stat() (fs.FileInfo, error) }:
		if fi, err := v.Stat(); err == nil && fi.Mode().IsRegular() {
			if off, err := v.(io.Seeker).Seek(0, io.SeekCurrent); err == nil {
				return fi.Size() - off
			}
		}
	}
	return 0
}

// reserve grows the Sample slice once, to what the rows read so far predict
// for the whole input, so that a large file is not copied at every doubling.
// The prediction assumes later rows are like the first ones; it is only a
// capacity, and append still grows past it if they are not.
func (p *csvParser) reserve(size, offset int64) {
	if offset <= 0 || len(p.samples) == 0 {
		return
	}
	rows := float64(size) * float64(p.rows) / float64(offset)
	want := int(rows*float64(len(p.samples))/float64(p.rows)*1.02) + 64
	const limit = 1 << 28 // a bound for an estimate gone wrong
	if want > len(p.samples) && want < limit {
		p.samples = slices.Grow(p.samples, want-len(p.samples))
	}
}

func (p *csvParser) csvError(err error) error {
	var pe *csv.ParseError
	if errors.As(err, &pe) {
		return &Error{Name: p.name, Line: pe.Line, Msg: "malformed CSV", Err: pe.Err}
	}
	return &Error{Name: p.name, Msg: "reading", Err: err}
}

func (p *csvParser) issue(line int, col, msg string) {
	p.rec.Issues = append(p.rec.Issues, Issue{Line: line, Column: col, Msg: msg})
}

func (p *csvParser) header(h []string, line int) error {
	p.cols = make([]column, len(h))
	seen := make(map[string]int, len(h))
	known := make(map[string]bool, len(p.opts.Known))
	for _, k := range p.opts.Known {
		known[k] = true
	}
	p.timeIdx = -1
	for i, raw := range h {
		n := strings.TrimSpace(raw)
		if i == 0 {
			n = strings.TrimSpace(strings.TrimPrefix(n, "\ufeff")) // a byte order mark, as spreadsheets write
		}
		p.cols[i] = column{name: n, line: line}
		if n == "" {
			p.cols[i].skip = true
			continue
		}
		if j, dup := seen[n]; dup {
			return errorf(p.name, line, n, "named twice in the header (columns %d and %d)", j+1, i+1)
		}
		seen[n] = i
	}
	if p.opts.TimeColumn == "" {
		if p.cols[0].name == "" {
			return errorf(p.name, line, "", "the first column, the time column, has no name")
		}
		p.timeIdx = 0
	} else if j, ok := seen[p.opts.TimeColumn]; ok {
		p.timeIdx = j
	} else {
		return errorf(p.name, line, p.opts.TimeColumn, "no such time column; the header has %s", quoteList(h))
	}
	p.cols[p.timeIdx].skip = false
	for i := range p.cols {
		c := &p.cols[i]
		if i == p.timeIdx || c.skip {
			continue
		}
		if len(known) > 0 && !known[c.name] {
			c.skip = true
			continue
		}
		p.rec.Signals = append(p.rec.Signals, c.name)
	}
	return nil
}

// quoteCell quotes a cell for a message, cut to its first 40 bytes.
func quoteCell(b []byte) string {
	if len(b) > 40 {
		return strconv.Quote(string(b[:40])) + "…"
	}
	return strconv.Quote(string(b))
}

func quoteList(h []string) string {
	var b strings.Builder
	for i, s := range h {
		if i > 0 {
			b.WriteString(", ")
		}
		b.WriteString(strconv.Quote(strings.TrimSpace(s)))
	}
	return b.String()
}

func (p *csvParser) row(row [][]byte, lines []int) error {
	line := lines[0]
	if line > math.MaxInt32 {
		return errorf(p.name, line, "", "too many lines")
	}
	blank := true
	for _, f := range row {
		if len(bytes.TrimSpace(f)) != 0 {
			blank = false
			break
		}
	}
	if blank {
		return nil // a row of empty cells carries nothing
	}
	tname := p.cols[p.timeIdx].name
	if p.timeIdx >= len(row) {
		return errorf(p.name, line, tname, "missing: the row has %d fields", len(row))
	}
	t, err := p.parseTime(bytes.TrimSpace(row[p.timeIdx]), lines[p.timeIdx])
	if err != nil {
		return err
	}
	if p.rows == 0 || t.Before(p.rec.Start) {
		p.rec.Start = t
	}
	if p.rows == 0 || t.After(p.rec.End) {
		p.rec.End = t
	}
	if p.rows > 0 && t.Before(p.prev) {
		p.sorted = false
		p.issue(line, tname, fmt.Sprintf("%s is before %s on line %d; rows are sorted by time",
			t.Format(time.RFC3339Nano), p.prev.Format(time.RFC3339Nano), p.prevLine))
	}
	p.rows++
	p.prev, p.prevLine = t, line

	n := min(len(row), len(p.cols))
	if len(row) < len(p.cols) {
		p.issue(line, "", fmt.Sprintf("the row has %d fields and the header %d; the missing cells are blank", len(row), len(p.cols)))
	}
	if len(row) > len(p.cols) {
		extra := 0
		for _, f := range row[len(p.cols):] {
			if len(bytes.TrimSpace(f)) != 0 {
				extra++
			}
		}
		if extra > 0 {
			p.issue(line, "", fmt.Sprintf("the row has %d fields and the header %d; %d values beyond the header were skipped",
				len(row), len(p.cols), extra))
		}
	}
	for j := 0; j < n; j++ {
		if j == p.timeIdx {
			continue
		}
		c := &p.cols[j]
		text := bytes.TrimSpace(row[j])
		if len(text) == 0 {
			continue
		}
		if c.skip {
			c.skipped++
			continue
		}
		v, ok := p.parseValue(text)
		if !ok {
			p.issue(lines[j], c.name, fmt.Sprintf("%s is not a number; skipped", quoteCell(text)))
			continue
		}
		if math.IsNaN(v) || math.IsInf(v, 0) {
			p.issue(lines[j], c.name, fmt.Sprintf("%s is not a finite number; skipped", quoteCell(text)))
			continue
		}
		// Set the fields in place: appending a Sample value would copy
		// it whole, under a bulk write barrier while the collector runs.
		k := len(p.samples)
		if k == cap(p.samples) {
			p.samples = slices.Grow(p.samples, 1)
		}
		p.samples = p.samples[:k+1]
		smp := &p.samples[k]
		smp.Signal, smp.Value, smp.Time, smp.Line = c.name, v, t, line
	}
	return nil
}

func (p *csvParser) parseValue(s []byte) (float64, bool) {
	if p.opts.DecimalComma {
		if bytes.IndexByte(s, '.') >= 0 {
			return 0, false
		}
		if i := bytes.IndexByte(s, ','); i >= 0 {
			p.scratch = append(p.scratch[:0], s...)
			p.scratch[i] = '.'
			s = p.scratch
		}
	}
	// The conversion does not allocate for numbers of up to 32 bytes.
	v, err := strconv.ParseFloat(string(s), 64)
	if err != nil {
		// A value beyond ±1.8e308 parses to ±Inf with ErrRange: it is
		// reported as not finite, like the text "Inf".
		var ne *strconv.NumError
		if errors.As(err, &ne) && ne.Err == strconv.ErrRange && math.IsInf(v, 0) {
			return v, true
		}
		return 0, false
	}
	return v, true
}

func (p *csvParser) parseTime(s []byte, line int) (time.Time, error) {
	tname := p.cols[p.timeIdx].name
	if len(s) == 0 {
		return time.Time{}, errorf(p.name, line, tname, "no time")
	}
	if p.format == TimeAuto {
		p.format = p.opts.TimeFormat
		if p.format == TimeAuto {
			if _, ok := parseWall(s); ok {
				p.format = TimeDateTime
			} else if sec, _, ok := parseSeconds(s, p.opts.DecimalComma); ok {
				if sec >= 1e8 {
					p.format = TimeUnix
				} else {
					p.format = TimeElapsed
				}
			} else {
				return time.Time{}, errorf(p.name, line, tname,
					"%s is not a time: want RFC 3339, a date and time without a zone, or seconds", quoteCell(s))
			}
		}
	}
	switch p.format {
	case TimeDateTime:
		w, ok := parseWall(s)
		if !ok {
			return time.Time{}, errorf(p.name, line, tname,
				"%s is not a date and time (want 2006-01-02T15:04:05.999Z07:00, or without a zone)", quoteCell(s))
		}
		if w.hasZone {
			return time.Unix(w.seconds()-int64(w.offset), int64(w.nsec)).In(p.out), nil
		}
		if p.opts.Location == nil {
			return time.Time{}, errorf(p.name, line, tname,
				"%s has no zone: give the location the file's times are in", quoteCell(s))
		}
		return p.local(&w, s, line)
	case TimeUnix, TimeElapsed:
		sec, nsec, ok := parseSeconds(s, p.opts.DecimalComma)
		if !ok {
			return time.Time{}, errorf(p.name, line, tname, "%s is not a number of seconds (%s time)", quoteCell(s), p.format)
		}
		if p.format == TimeUnix {
			return time.Unix(sec, nsec).In(p.out), nil
		}
		return p.opts.Origin.Add(time.Duration(sec)*time.Second + time.Duration(nsec)).In(p.out), nil
	}
	return time.Time{}, errorf(p.name, line, tname, "unknown time format %s", p.format)
}

// local resolves a zone-less date-time in the given location.
func (p *csvParser) local(w *wallTime, s []byte, line int) (time.Time, error) {
	n := p.zr.resolve(&p.resolvBuf, w.seconds())
	switch n {
	case 0:
		return time.Time{}, errorf(p.name, line, p.cols[p.timeIdx].name,
			"%s does not exist in %s (the clocks jump forward there): is the file in another zone?", quoteCell(s), p.opts.Location)
	case 1:
		p.flushAmbiguous()
		return time.Unix(p.resolvBuf[0], int64(w.nsec)).In(p.out), nil
	}
	// Two instants have this wall clock: take the earlier one unless that
	// would go back in time from the previous row.
	t := time.Unix(p.resolvBuf[0], int64(w.nsec)).In(p.out)
	if p.rows > 0 && t.Before(p.prev) {
		t = time.Unix(p.resolvBuf[1], int64(w.nsec)).In(p.out)
	}
	if p.amb.n == 0 {
		p.amb.first = line
	}
	p.amb.last = line
	p.amb.n++
	return t, nil
}

func (p *csvParser) flushAmbiguous() {
	if p.amb.n == 0 {
		return
	}
	p.issue(p.amb.first, p.cols[p.timeIdx].name, fmt.Sprintf(
		"the local times of %d rows, lines %d to %d, occur twice in %s (the clocks go back); each was read as the earliest instant not before the previous row",
		p.amb.n, p.amb.first, p.amb.last, p.opts.Location))
	p.amb = ambiguousRun{}
}

// duplicates reports rows with equal times and keeps, for a signal present
// in more than one of them, only the value of the last such row.
func (p *csvParser) duplicates() {
	s := p.samples
	out := s[:0]
	lastA, lastB := -1, -1
	for i := 0; i < len(s); {
		j := i + 1
		for j < len(s) && s[j].Time.Equal(s[i].Time) {
			j++
		}
		group := s[i:j]
		if group[0].Line == group[len(group)-1].Line {
			if len(out) < i {
				out = append(out, group...)
			} else {
				out = s[:j]
			}
			i = j
			continue
		}
		for k := 1; k < len(group); k++ {
			a, b := group[k-1].Line, group[k].Line
			if a != b && (a != lastA || b != lastB) {
				p.issue(b, "", fmt.Sprintf("same time as line %d (%s); both rows are kept, and a signal in both takes this row's value",
					a, group[k].Time.Format(time.RFC3339Nano)))
				lastA, lastB = a, b
			}
		}
		for k, c := range group {
			replaced := 0
			for _, o := range group[k+1:] {
				if o.Signal == c.Signal {
					replaced = o.Line
					break
				}
			}
			if replaced == 0 {
				out = append(out, c)
				continue
			}
			p.issue(c.Line, c.Signal, fmt.Sprintf("value %g replaced by the one on line %d, at the same time", c.Value, replaced))
		}
		i = j
	}
	clear(s[len(out):])
	p.samples = out
}
