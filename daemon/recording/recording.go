package recording

import (
	"fmt"
	"strconv"
	"time"
)

// Sample is one value of one signal, as read from a recording.
type Sample struct {
	Signal string    // the signal's name (a column header)
	Value  float64   // always finite
	Time   time.Time // the sample's own time
	Line   int       // the line of the file it came from, counting from 1
}

// Issue is something in a recording that was not as it should be but did
// not stop the reading: a cell that was skipped, rows out of order, a
// repeated time. Every value that did not become a Sample is accounted for
// by an Issue.
type Issue struct {
	Line   int    // line of the file, counting from 1
	Column string // column (signal) name, "" when the issue concerns a whole row
	// What says what Column names: "column" when empty (a CSV column), or
	// "subject" (a bus recording's subject), "signal" (a plant's signal),
	// "field" (a field of a bus recording's line).
	What string
	Msg  string
}

// String formats the issue as "line 12: column "T1": message" (or
// "subject …", "signal …", "field …", as What says).
func (i Issue) String() string {
	if i.Column == "" {
		return "line " + strconv.Itoa(i.Line) + ": " + i.Msg
	}
	what := i.What
	if what == "" {
		what = "column"
	}
	return "line " + strconv.Itoa(i.Line) + ": " + what + " " + strconv.Quote(i.Column) + ": " + i.Msg
}

// Error is a problem that stops a recording from being read: it names the
// file, the line and, when it applies, the column.
type Error struct {
	Name   string // the name given to the reader, usually the file's path
	Line   int    // 0 when the problem is not on one line
	Column string
	Msg    string
	Err    error // the underlying error, if any
}

// Error formats the error as "name:line: column "c": message".
func (e *Error) Error() string {
	s := e.Name
	if e.Line > 0 {
		s += ":" + strconv.Itoa(e.Line)
	}
	s += ": "
	if e.Column != "" {
		s += "column " + strconv.Quote(e.Column) + ": "
	}
	s += e.Msg
	if e.Err != nil {
		s += ": " + e.Err.Error()
	}
	return s
}

// Unwrap returns the underlying error.
func (e *Error) Unwrap() error { return e.Err }

func errorf(name string, line int, column, format string, args ...any) *Error {
	return &Error{Name: name, Line: line, Column: column, Msg: fmt.Sprintf(format, args...)}
}
