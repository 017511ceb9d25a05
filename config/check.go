package config

import (
	"fmt"
	"math"
	"regexp"
	"strings"
	"unicode"

	"gonum.org/v1/gonum/mat"
)

// estimatorName is the rule for a plant's name: it becomes a token of bus
// subjects and a metric label value.
var estimatorName = regexp.MustCompile(`^[a-z][a-z0-9_-]{0,62}$`)

// signalName is the rule for the name of a state, input or output: it is a
// metric label value, a column of a recording and a key of the published
// estimate.
var signalName = regexp.MustCompile(`^[A-Za-z][A-Za-z0-9_-]{0,62}$`)

// subjectProblem returns why s cannot be the subject of one signal, or "".
// A subject is a list of tokens separated by dots; a signal needs one
// concrete subject, so wildcards are refused.
func subjectProblem(s string) string {
	if s == "" {
		return "empty subject"
	}
	if len(s) > 255 {
		return fmt.Sprintf("subject of %d bytes, at most 255 are allowed", len(s))
	}
	for _, tok := range strings.Split(s, ".") {
		if tok == "" {
			return fmt.Sprintf("subject %q has an empty token (two dots in a row, or a dot at an end)", s)
		}
		if strings.ContainsAny(tok, "*>") {
			return fmt.Sprintf("subject %q has a wildcard (* or >): each signal needs one concrete subject", s)
		}
		for _, r := range tok {
			if unicode.IsSpace(r) || !unicode.IsPrint(r) {
				return fmt.Sprintf("subject %q contains a space or control character", s)
			}
		}
	}
	return ""
}

// covariance checks that rows hold a symmetric matrix that is positive
// definite (strict) or positive semidefinite, and returns it. Entries (i, j)
// and (j, i) may differ by a relative 1e-9 (rounding in a file written by
// another program); the returned matrix holds their mean. An eigenvalue counts
// as zero when it is within 1e-12 of the largest in magnitude.
func covariance(rows [][]float64, strict bool) (*mat.SymDense, string) {
	n := len(rows)
	s := mat.NewSymDense(n, nil)
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			a, b := rows[i][j], rows[j][i]
			if a != b && math.Abs(a-b) > 1e-9*math.Max(math.Abs(a), math.Abs(b)) {
				return nil, fmt.Sprintf("not symmetric: entry [%d][%d] is %v but [%d][%d] is %v", i, j, a, j, i, b)
			}
			s.SetSym(i, j, (a+b)/2)
		}
	}
	var es mat.EigenSym
	if !es.Factorize(s, false) {
		return nil, "its eigenvalues could not be computed"
	}
	vals := es.Values(nil)
	lo, big := math.Inf(1), 0.0
	for _, v := range vals {
		lo = math.Min(lo, v)
		big = math.Max(big, math.Abs(v))
	}
	tol := 1e-12 * big
	if strict && lo <= tol {
		return nil, fmt.Sprintf("not positive definite (smallest eigenvalue %.6g)", lo)
	}
	if !strict && lo < -tol {
		return nil, fmt.Sprintf("not positive semidefinite (smallest eigenvalue %.6g)", lo)
	}
	return s, ""
}

// diagonal returns the covariance matrix diag(std²).
func diagonal(std []float64) *mat.SymDense {
	s := mat.NewSymDense(len(std), nil)
	for i, v := range std {
		s.SetSym(i, i, v*v)
	}
	return s
}

// dense copies rows into a new matrix.
func dense(rows [][]float64) *mat.Dense {
	r, c := len(rows), len(rows[0])
	m := mat.NewDense(r, c, nil)
	for i, row := range rows {
		m.SetRow(i, row)
	}
	return m
}
