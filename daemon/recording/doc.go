// Package recording reads and writes the recordings that a replay runs on:
// historian-style CSV exports and the bus recordings written by
// `surmise record`.
//
// The parsers are pure functions of their input (ReadCSV, ReadJSONL); the
// only I/O is the io.Reader or io.Writer the caller hands in. Nothing here
// knows about plants or the tick engine: a recording is a list of time-
// stamped values or messages, and the replay driver decides what they mean.
//
// # CSV recordings
//
// A header row names the columns: one time column (the first, unless
// CSVOptions.TimeColumn names another) and one column per signal. Each
// further row is one time; a blank cell means the signal has no sample at
// that time. Cells are trimmed of spaces; quoting follows RFC 4180
// (encoding/csv). A byte order mark before the header is ignored. A column
// with an empty header (as a trailing delimiter makes) is not a signal.
//
// The time column may be written as
//   - RFC 3339: "2024-03-31T01:59:59.25+01:00" or with "Z"; a space may
//     replace the 'T' and the fraction may have any number of digits,
//     separated by '.' or ',';
//   - the same without a zone, "2024-03-31 01:59:59.25", read as wall-clock
//     time in CSVOptions.Location, which must then be given;
//   - Unix seconds, "1711846799.25";
//   - seconds since CSVOptions.Origin, "12.5".
//
// TimeAuto (the default) detects which from the first data row and holds
// every other row to it. In a zone with daylight saving time a zone-less
// time can fall in the hour that is skipped when the clocks go forward (an
// error: no clock showed it) or in the hour that is repeated when they go
// back: such a time is read as the earliest instant that is not before the
// previous row, which reads an export in time order correctly, and each
// run of such rows is reported as one Issue.
//
// Decimal comma: numbers use '.' unless CSVOptions.DecimalComma is set,
// which needs a delimiter other than ',' (usually ';'). It is never guessed:
// "1,5" could be one and a half or a thousands-separated fifteen hundred.
//
// # What stops the reading and what does not
//
// Errors (*Error, naming the line and column): a malformed CSV row (a stray
// quote), an empty file, a header naming a column twice, a missing time
// column, a time that does not parse or does not exist in its zone, a date-
// time without a zone when no Location is given, no data rows.
//
// Issues (Recording.Issues, each with its line and column; the data are
// read on): a cell that is not a number, or is NaN or infinite, is skipped;
// the cells of a column that is not among CSVOptions.Known, or has no name,
// are skipped and counted, one Issue per column; a row with more fields
// than the header has its extra values skipped; a row with fewer has blank
// cells; rows out of time order are sorted (stably: rows with equal times
// keep the file's order), each row that goes back in time reported; rows
// with the same time are all kept, and for a signal that has a value in more
// than one of them the last row's value wins, the others reported. Nothing
// is dropped silently: every non-blank cell either becomes a Sample or is
// counted in an Issue.
//
// # Bus recordings (JSON Lines)
//
// One JSON object per line, each line ending in "\n":
//
//	{"recv":"2024-05-06T07:08:09.123456789Z","subject":"plant.loop.t_tank","payload":"61.25"}
//
// recv is the time the recorder received the message (RFC 3339 with a
// zone; written in UTC with nanoseconds), subject the subject it was
// published on, and payload the payload bytes as a JSON string. A payload
// that is not valid UTF-8 is written as "payload_base64" (standard base64,
// with padding) instead, so any payload survives exactly. No other members
// are allowed, none may repeat, and the line must be valid UTF-8. Blank
// lines are ignored.
//
// The Writer writes each line with a single Write call, so a recorder that
// is killed leaves at most one partial line, at the end. ReadJSONL reports
// such a line (a last line without its newline that does not parse) as an
// Issue and ignores it; any other bad line is an error naming its line.
// Messages whose receive time goes back (a wall clock stepped) are sorted
// stably, each reported as an Issue.
//
// # Performance
//
// ReadCSV splits a line without quotes in place and parses times and
// numbers by hand, without allocating; only a record with quotes goes
// through encoding/csv. The one Sample slice is reserved after the first
// rows, from the size of the input when the reader can tell it
// (bytes.Reader, strings.Reader, os.File), so a large file is not copied at
// every doubling. ReadJSONL copies payloads into 64 KiB blocks and interns
// subjects.
package recording
