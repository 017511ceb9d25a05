package config

import (
	"fmt"
	"sort"
	"strings"
)

// FieldError is one problem found in a plant or gains file, with the position
// of the YAML node it concerns and the dotted path of the field
// (for example "outputs[1].range" or "model.A[2][0]"; indices count from 0).
// Line and Column count from 1; they are 0 when the problem has no position
// (an empty file, a YAML error that names no line).
type FieldError struct {
	File   string
	Line   int
	Column int
	Field  string
	Msg    string
}

// Error formats the error as "file:line:column: field: message", leaving out
// the parts that are unknown.
func (e FieldError) Error() string {
	var b strings.Builder
	b.WriteString(e.File)
	if e.Line > 0 {
		fmt.Fprintf(&b, ":%d", e.Line)
		if e.Column > 0 {
			fmt.Fprintf(&b, ":%d", e.Column)
		}
	}
	b.WriteString(": ")
	if e.Field != "" {
		b.WriteString(e.Field)
		b.WriteString(": ")
	}
	b.WriteString(e.Msg)
	return b.String()
}

// ErrorList is every problem found in one file, in the order of their
// positions in the file. ParsePlant and ParseGains return an *ErrorList when
// the file is invalid, so that a user can fix them all in one go.
type ErrorList struct {
	Errors []FieldError
}

// Error joins the errors, one per line.
func (l *ErrorList) Error() string {
	lines := make([]string, len(l.Errors))
	for i, e := range l.Errors {
		lines[i] = e.Error()
	}
	return strings.Join(lines, "\n")
}

// Unwrap returns the errors, for errors.As and errors.Is.
func (l *ErrorList) Unwrap() []error {
	errs := make([]error, len(l.Errors))
	for i, e := range l.Errors {
		errs[i] = e
	}
	return errs
}

// sortErrors orders errors by position; errors without a position come first,
// and errors at the same position keep the order in which they were found.
func sortErrors(errs []FieldError) {
	sort.SliceStable(errs, func(i, j int) bool {
		if errs[i].Line != errs[j].Line {
			return errs[i].Line < errs[j].Line
		}
		return errs[i].Column < errs[j].Column
	})
}
