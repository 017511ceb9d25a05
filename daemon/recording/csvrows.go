package recording

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"errors"
	"io"
	"unicode/utf8"
)

// rowReader yields the records of a CSV input with their line numbers. A
// line without a quote character (nearly every line of a historian export)
// is split in place, without allocating; a record with quotes, which may
// span lines, is handed to encoding/csv, so quoting follows RFC 4180
// exactly as encoding/csv reads it. Empty lines are skipped, "\r\n" ends a
// line like "\n", and a '\r' before the end of the input is dropped, all as
// in encoding/csv.
type rowReader struct {
	br     *bufio.Reader
	comma  rune
	sep    []byte
	line   int   // lines read so far
	offset int64 // bytes read so far
	long   []byte

	fields [][]byte
	lines  []int // line of each field

	chunk  []byte
	queued []queuedRecord // records of a quoted chunk not yet returned
}

type queuedRecord struct {
	fields [][]byte
	lines  []int
}

// validDelim reports whether r can separate fields (encoding/csv's rule).
func validDelim(r rune) bool {
	return r != 0 && r != '"' && r != '\r' && r != '\n' && utf8.ValidRune(r) && r != utf8.RuneError
}

func newRowReader(r io.Reader, comma rune) *rowReader {
	return &rowReader{
		br:    bufio.NewReaderSize(r, 64<<10),
		comma: comma,
		sep:   utf8.AppendRune(nil, comma),
	}
}

// readLine returns the next line, with its newline, as encoding/csv's
// readLine does, without normalising it.
func (rr *rowReader) readLine() ([]byte, error) {
	b, err := rr.br.ReadSlice('\n')
	if err == bufio.ErrBufferFull {
		rr.long = append(rr.long[:0], b...)
		for err == bufio.ErrBufferFull {
			b, err = rr.br.ReadSlice('\n')
			rr.long = append(rr.long, b...)
		}
		b = rr.long
	}
	if len(b) > 0 && err == io.EOF {
		err = nil
	}
	if len(b) > 0 {
		rr.line++
		rr.offset += int64(len(b))
	}
	return b, err
}

// next returns the fields of the next record and the line of each field.
// The slices are valid until the next call. It returns io.EOF at the end
// and a *csv.ParseError, with lines counted from the start of the input,
// for a malformed record.
func (rr *rowReader) next() ([][]byte, []int, error) {
	if len(rr.queued) > 0 {
		q := rr.queued[0]
		rr.queued = rr.queued[1:]
		return q.fields, q.lines, nil
	}
	for {
		raw, err := rr.readLine()
		if err != nil {
			return nil, nil, err
		}
		if len(raw) == 0 {
			return nil, nil, io.EOF
		}
		if bytes.IndexByte(raw, '"') >= 0 {
			return rr.quoted(raw)
		}
		content := raw
		if n := len(content); n > 0 && content[n-1] == '\n' {
			content = content[:n-1]
			if n := len(content); n > 0 && content[n-1] == '\r' {
				content = content[:n-1]
			}
		} else if n > 0 && content[n-1] == '\r' {
			content = content[:n-1] // a '\r' before the end of the input
		}
		if len(content) == 0 {
			continue
		}
		rr.fields, rr.lines = rr.fields[:0], rr.lines[:0]
		for {
			i := bytes.Index(content, rr.sep)
			if i < 0 {
				rr.fields = append(rr.fields, content)
				rr.lines = append(rr.lines, rr.line)
				break
			}
			rr.fields = append(rr.fields, content[:i])
			rr.lines = append(rr.lines, rr.line)
			content = content[i+len(rr.sep):]
		}
		return rr.fields, rr.lines, nil
	}
}

// quoted reads the lines of a record that contains quotes, until the
// quotes balance at the end of a line, and parses them with encoding/csv.
func (rr *rowReader) quoted(first []byte) ([][]byte, []int, error) {
	start := rr.line
	rr.chunk = append(rr.chunk[:0], first...)
	for bytes.Count(rr.chunk, []byte{'"'})%2 == 1 {
		b, err := rr.readLine()
		if err != nil && err != io.EOF {
			return nil, nil, err
		}
		if len(b) == 0 {
			break // encoding/csv reports the open quote
		}
		rr.chunk = append(rr.chunk, b...)
	}
	cr := csv.NewReader(bytes.NewReader(rr.chunk))
	cr.Comma = rr.comma
	cr.FieldsPerRecord = -1
	var recs []queuedRecord
	for {
		rec, err := cr.Read()
		if err == io.EOF {
			break
		}
		if err != nil {
			var pe *csv.ParseError
			if errors.As(err, &pe) {
				shifted := *pe
				shifted.StartLine += start - 1
				shifted.Line += start - 1
				return nil, nil, &shifted
			}
			return nil, nil, err
		}
		q := queuedRecord{fields: make([][]byte, len(rec)), lines: make([]int, len(rec))}
		for i, f := range rec {
			q.fields[i] = []byte(f)
			l, _ := cr.FieldPos(i)
			q.lines[i] = l + start - 1
		}
		recs = append(recs, q)
	}
	if len(recs) == 0 {
		return rr.next() // only empty lines, after all
	}
	rr.queued = recs[1:]
	return recs[0].fields, recs[0].lines, nil
}
