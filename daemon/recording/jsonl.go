package recording

import (
	"bufio"
	"bytes"
	"encoding/base64"
	"errors"
	"fmt"
	"io"
	"slices"
	"strconv"
	"sync"
	"time"
	"unicode/utf16"
	"unicode/utf8"
)

// Message is one message of a bus recording.
type Message struct {
	Recv    time.Time // when the recorder received it, in UTC
	Subject string
	Payload []byte // exactly as published; never nil, possibly empty
	Line    int    // line of the file, counting from 1
}

// BusRecording is a bus recording as read by ReadJSONL.
type BusRecording struct {
	Name     string
	Messages []Message // in order of receive time; equal times keep the file's order
	Subjects []string  // in order of first appearance
	// Start and End are the first and last receive times.
	Start, End time.Time
	// Issues are the problems that did not stop the reading, in line order.
	Issues []Issue
}

// jsonlBufSize is the reader's buffer; longer lines are assembled in a
// scratch buffer.
const jsonlBufSize = 64 << 10

// arenaSize is the size of the blocks that payloads are copied into, so
// that reading a recording costs one allocation per block, not one per
// message.
const arenaSize = 64 << 10

// ReadJSONL reads a bus recording (the format is in the package
// documentation). name identifies the source in errors and issues. A last
// line without its newline that does not parse is the mark of a recorder
// that was stopped mid-write: it is reported as an Issue and ignored. Any
// other line that does not parse is an error naming its line.
func ReadJSONL(r io.Reader, name string) (*BusRecording, error) {
	br := bufio.NewReaderSize(r, jsonlBufSize)
	rec := &BusRecording{Name: name}
	var (
		d        lineDecoder
		long     []byte
		arena    []byte
		subjects = map[string]string{}
		sorted   = true
		line     int
	)
	for {
		b, err := br.ReadSlice('\n')
		if err == bufio.ErrBufferFull {
			long = append(long[:0], b...)
			for err == bufio.ErrBufferFull {
				b, err = br.ReadSlice('\n')
				long = append(long, b...)
			}
			b = long
		}
		if err != nil && err != io.EOF {
			return nil, &Error{Name: name, Line: line + 1, Msg: "reading", Err: err}
		}
		if len(b) == 0 && err == io.EOF {
			break
		}
		line++
		complete := len(b) > 0 && b[len(b)-1] == '\n'
		b = bytes.TrimSuffix(b, []byte("\n"))
		b = bytes.TrimSuffix(b, []byte("\r"))
		if len(bytes.TrimSpace(b)) == 0 {
			if err == io.EOF {
				break
			}
			continue // a blank line holds nothing
		}
		if perr := d.decode(b); perr != "" {
			if !complete {
				rec.Issues = append(rec.Issues, Issue{Line: line, Msg: "the last line is cut short (" + perr +
					"), as a recorder stopped mid-write leaves it; ignored"})
				break
			}
			return nil, &Error{Name: name, Line: line, Msg: perr}
		}
		recv, ok := d.recvTime()
		if !ok {
			return nil, &Error{Name: name, Line: line, Column: "recv",
				Msg: quoteCell(d.recv) + " is not an RFC 3339 time with a zone, in the years 1 to 9999"}
		}
		subj, ok := subjects[string(d.subject)]
		if !ok {
			subj = string(d.subject)
			subjects[subj] = subj
			rec.Subjects = append(rec.Subjects, subj)
		}
		n := len(d.payload)
		if d.base64 {
			n = base64.StdEncoding.DecodedLen(len(d.payload))
		}
		if cap(arena)-len(arena) < n {
			arena = make([]byte, 0, max(arenaSize, n))
		}
		start := len(arena)
		if d.base64 {
			m, err := base64.StdEncoding.Decode(arena[start:start+n], d.payload)
			if err != nil {
				return nil, &Error{Name: name, Line: line, Column: "payload_base64", Msg: "not standard base64", Err: err}
			}
			n = m
		} else {
			copy(arena[start:start+n], d.payload)
		}
		arena = arena[:start+n]
		msg := Message{Recv: recv, Subject: subj, Payload: arena[start : start+n : start+n], Line: line}
		if k := len(rec.Messages); k > 0 && recv.Before(rec.Messages[k-1].Recv) {
			sorted = false
			rec.Issues = append(rec.Issues, Issue{Line: line, Column: "recv", What: "field", Msg: fmt.Sprintf(
				"%s is before %s on line %d; messages are sorted by receive time",
				recv.Format(time.RFC3339Nano), rec.Messages[k-1].Recv.Format(time.RFC3339Nano), rec.Messages[k-1].Line)})
		}
		if len(rec.Messages) == 0 || recv.Before(rec.Start) {
			rec.Start = recv
		}
		if len(rec.Messages) == 0 || recv.After(rec.End) {
			rec.End = recv
		}
		rec.Messages = append(rec.Messages, msg)
		if err == io.EOF {
			break
		}
	}
	if len(rec.Messages) == 0 {
		return nil, &Error{Name: name, Msg: "no messages"}
	}
	if !sorted {
		slices.SortStableFunc(rec.Messages, func(a, b Message) int { return a.Recv.Compare(b.Recv) })
	}
	return rec, nil
}

// lineDecoder decodes one line of a bus recording into reused buffers.
type lineDecoder struct {
	recv, subject, payload []byte
	key                    []byte
	base64                 bool
}

// decode parses one JSON object with string members recv, subject and
// either payload or payload_base64. It returns "" on success, else what is
// wrong. It is strict: no other members, no repeated members, no trailing
// text, valid UTF-8 only.
func (d *lineDecoder) decode(b []byte) string {
	if !utf8.Valid(b) {
		return "not valid UTF-8"
	}
	d.recv, d.subject, d.payload = d.recv[:0], d.subject[:0], d.payload[:0]
	d.base64 = false
	var seen [4]bool // recv, subject, payload, payload_base64
	i := skipSpace(b, 0)
	if i >= len(b) || b[i] != '{' {
		return "want a JSON object"
	}
	i = skipSpace(b, i+1)
	for first := true; ; first = false {
		if i < len(b) && b[i] == '}' && first {
			break
		}
		var msg string
		d.key, i, msg = appendString(d.key[:0], b, i)
		key := d.key
		if msg != "" {
			return "member name: " + msg
		}
		i = skipSpace(b, i)
		if i >= len(b) || b[i] != ':' {
			return "want ':' after a member name"
		}
		i = skipSpace(b, i+1)
		var k int
		switch string(key) {
		case "recv":
			d.recv, i, msg = appendString(d.recv, b, i)
		case "subject":
			k = 1
			d.subject, i, msg = appendString(d.subject, b, i)
		case "payload":
			k = 2
			d.payload, i, msg = appendString(d.payload, b, i)
		case "payload_base64":
			k = 3
			d.payload, i, msg = appendString(d.payload, b, i)
		default:
			return "unknown member " + quoteCell(key)
		}
		if msg != "" {
			return string(key) + ": " + msg
		}
		if seen[k] {
			return "member " + quoteCell(key) + " given twice"
		}
		seen[k] = true
		i = skipSpace(b, i)
		if i < len(b) && b[i] == ',' {
			i = skipSpace(b, i+1)
			continue
		}
		if i < len(b) && b[i] == '}' {
			break
		}
		return "want ',' or '}' after a member"
	}
	if i = skipSpace(b, i+1); i != len(b) {
		return "text after the object"
	}
	switch {
	case !seen[0]:
		return `no "recv"`
	case !seen[1]:
		return `no "subject"`
	case seen[2] && seen[3]:
		return `both "payload" and "payload_base64"`
	case !seen[2] && !seen[3]:
		return `no "payload"`
	}
	d.base64 = seen[3]
	return ""
}

func (d *lineDecoder) recvTime() (time.Time, bool) {
	w, ok := parseWall(d.recv)
	if !ok || !w.hasZone {
		return time.Time{}, false
	}
	t := time.Unix(w.seconds()-int64(w.offset), int64(w.nsec)).UTC()
	if y := t.Year(); y < 1 || y > 9999 {
		return time.Time{}, false // RFC 3339 cannot write it in UTC
	}
	return t, true
}

func skipSpace(b []byte, i int) int {
	for i < len(b) && (b[i] == ' ' || b[i] == '\t' || b[i] == '\r' || b[i] == '\n') {
		i++
	}
	return i
}

// appendString decodes the JSON string starting at b[i] (its opening
// quote), appends its value to dst and returns the index after the closing
// quote. Lone surrogates become U+FFFD, as encoding/json decodes them.
func appendString(dst, b []byte, i int) ([]byte, int, string) {
	if i >= len(b) || b[i] != '"' {
		return dst, i, "want a string"
	}
	i++
	for {
		start := i
		for i < len(b) && b[i] != '"' && b[i] != '\\' && b[i] >= 0x20 {
			i++
		}
		dst = append(dst, b[start:i]...)
		if i >= len(b) {
			return dst, i, "unterminated string"
		}
		switch c := b[i]; {
		case c == '"':
			return dst, i + 1, ""
		case c < 0x20:
			return dst, i, "control character in a string"
		}
		// An escape.
		if i+1 >= len(b) {
			return dst, i, "unterminated escape"
		}
		e := b[i+1]
		i += 2
		switch e {
		case '"', '\\', '/':
			dst = append(dst, e)
		case 'b':
			dst = append(dst, '\b')
		case 'f':
			dst = append(dst, '\f')
		case 'n':
			dst = append(dst, '\n')
		case 'r':
			dst = append(dst, '\r')
		case 't':
			dst = append(dst, '\t')
		case 'u':
			r, ok := hex4(b, i)
			if !ok {
				return dst, i, `bad \u escape`
			}
			i += 4
			if utf16.IsSurrogate(r) {
				r2, ok2 := rune(-1), false
				if i+1 < len(b) && b[i] == '\\' && b[i+1] == 'u' {
					r2, ok2 = hex4(b, i+2)
				}
				if ok2 {
					if dec := utf16.DecodeRune(r, r2); dec != utf8.RuneError {
						r = dec
						i += 6
					} else {
						r = utf8.RuneError
					}
				} else {
					r = utf8.RuneError
				}
			}
			dst = utf8.AppendRune(dst, r)
		default:
			return dst, i, fmt.Sprintf("bad escape \\%c", e)
		}
	}
}

func hex4(b []byte, i int) (rune, bool) {
	if i+4 > len(b) {
		return 0, false
	}
	var r rune
	for _, c := range b[i : i+4] {
		switch {
		case c >= '0' && c <= '9':
			c -= '0'
		case c >= 'a' && c <= 'f':
			c -= 'a' - 10
		case c >= 'A' && c <= 'F':
			c -= 'A' - 10
		default:
			return 0, false
		}
		r = r<<4 | rune(c)
	}
	return r, true
}

// Writer writes a bus recording, one line per message. It is safe for
// concurrent use.
type Writer struct {
	mu  sync.Mutex
	w   io.Writer
	buf []byte
	err error // sticky: after a failed or short write, the file's last line may be cut
}

// NewWriter returns a Writer that writes to w. The Writer does not buffer:
// each message reaches w in one Write call.
func NewWriter(w io.Writer) *Writer {
	return &Writer{w: w, buf: make([]byte, 0, 512)}
}

// errClosed is returned by Write after Close.
var errClosed = errors.New("recording: write after Close")

// Write writes one message as one complete line with a single Write call
// on the underlying writer, then flushes it if it has a Flush() error
// method, so a recorder that is killed loses at most the line being
// written. A payload that is valid UTF-8 is written as "payload", any
// other as "payload_base64". After a failed write every later Write
// returns the same error, as the file may end in a partial line. Write
// allocates nothing once its buffer has grown to the largest message.
func (w *Writer) Write(recv time.Time, subject string, payload []byte) error {
	if !utf8.ValidString(subject) {
		return fmt.Errorf("recording: subject %q is not valid UTF-8", subject)
	}
	if y := recv.UTC().Year(); y < 1 || y > 9999 {
		return fmt.Errorf("recording: receive time %v is outside the years 1 to 9999", recv)
	}
	w.mu.Lock()
	defer w.mu.Unlock()
	if w.err != nil {
		return w.err
	}
	b := append(w.buf[:0], `{"recv":"`...)
	b = recv.UTC().AppendFormat(b, time.RFC3339Nano)
	b = append(b, `","subject":`...)
	b = appendJSONString(b, subject)
	if utf8.Valid(payload) {
		b = append(b, `,"payload":`...)
		b = appendJSONString(b, payload)
	} else {
		b = append(b, `,"payload_base64":"`...)
		b = base64.StdEncoding.AppendEncode(b, payload)
		b = append(b, '"')
	}
	b = append(b, "}\n"...)
	w.buf = b
	n, err := w.w.Write(b)
	if err == nil && n != len(b) {
		err = io.ErrShortWrite
	}
	if err == nil {
		if f, ok := w.w.(interface{ Flush() error }); ok {
			err = f.Flush()
		}
	}
	if err != nil {
		w.err = fmt.Errorf("recording: writing a message on %q: %w", subject, err)
		return w.err
	}
	return nil
}

// Close flushes the underlying writer if it has a Flush() error method and
// makes later writes fail. It does not close the underlying writer. It
// returns the error of an earlier failed write, if there was one.
func (w *Writer) Close() error {
	w.mu.Lock()
	defer w.mu.Unlock()
	if w.err == errClosed {
		return nil
	}
	err := w.err
	if err == nil {
		if f, ok := w.w.(interface{ Flush() error }); ok {
			err = f.Flush()
		}
	}
	w.err = errClosed
	return err
}

// appendJSONString appends s as a JSON string. s must be valid UTF-8.
func appendJSONString[T string | []byte](b []byte, s T) []byte {
	const hex = "0123456789abcdef"
	b = append(b, '"')
	start := 0
	for i := 0; i < len(s); i++ {
		c := s[i]
		if c >= 0x20 && c != '"' && c != '\\' {
			continue
		}
		b = append(b, s[start:i]...)
		switch c {
		case '"', '\\':
			b = append(b, '\\', c)
		case '\n':
			b = append(b, '\\', 'n')
		case '\r':
			b = append(b, '\\', 'r')
		case '\t':
			b = append(b, '\\', 't')
		default:
			b = append(b, '\\', 'u', '0', '0', hex[c>>4], hex[c&0xf])
		}
		start = i + 1
	}
	b = append(b, s[start:]...)
	return append(b, '"')
}

// String formats the message for people: time, subject and payload.
func (m Message) String() string {
	return m.Recv.Format(time.RFC3339Nano) + " " + m.Subject + " " + strconv.Quote(string(m.Payload))
}
