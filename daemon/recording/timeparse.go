package recording

import (
	"math"
	"strconv"
	"strings"
	"time"
)

// wallTime is a calendar date and clock time as written in a file, before
// any zone is applied.
type wallTime struct {
	year, month, day int
	hour, min, sec   int
	nsec             int
	hasZone          bool
	offset           int // seconds east of UTC, when hasZone
}

// parseWall parses "YYYY-MM-DD[T| ]hh:mm:ss[.fraction][Z|±hh:mm]". The
// fraction may use '.' or ',' (ISO 8601 allows both) and have any number of
// digits; digits past the ninth (below a nanosecond) are dropped. It checks
// every field's range, including the day against the month's length.
func parseWall[T string | []byte](s T) (w wallTime, ok bool) {
	if len(s) < 19 {
		return w, false
	}
	var okY, okMo, okD, okH, okMi, okS bool
	w.year, okY = digits(s[0:4])
	w.month, okMo = digits(s[5:7])
	w.day, okD = digits(s[8:10])
	w.hour, okH = digits(s[11:13])
	w.min, okMi = digits(s[14:16])
	w.sec, okS = digits(s[17:19])
	if !(okY && okMo && okD && okH && okMi && okS) ||
		s[4] != '-' || s[7] != '-' || s[13] != ':' || s[16] != ':' {
		return w, false
	}
	switch s[10] {
	case 'T', 't', ' ':
	default:
		return w, false
	}
	if w.month < 1 || w.month > 12 || w.day < 1 || w.day > daysIn(w.month, w.year) ||
		w.hour > 23 || w.min > 59 || w.sec > 59 {
		return w, false
	}
	rest := s[19:]
	if len(rest) > 0 && (rest[0] == '.' || rest[0] == ',') {
		i := 1
		scale := 100_000_000
		for i < len(rest) && rest[i] >= '0' && rest[i] <= '9' {
			w.nsec += int(rest[i]-'0') * scale
			scale /= 10
			i++
		}
		if i == 1 {
			return w, false // a separator without digits
		}
		rest = rest[i:]
	}
	switch {
	case len(rest) == 0:
	case len(rest) == 1 && (rest[0] == 'Z' || rest[0] == 'z'):
		w.hasZone = true
	case len(rest) == 6 && (rest[0] == '+' || rest[0] == '-') && rest[3] == ':':
		oh, ok1 := digits(rest[1:3])
		om, ok2 := digits(rest[4:6])
		if !ok1 || !ok2 || oh > 23 || om > 59 {
			return w, false
		}
		w.hasZone = true
		w.offset = oh*3600 + om*60
		if rest[0] == '-' {
			w.offset = -w.offset
		}
	default:
		return w, false
	}
	return w, true
}

// digits parses a fixed-width run of ASCII digits.
func digits[T string | []byte](s T) (int, bool) {
	n := 0
	for i := 0; i < len(s); i++ {
		c := s[i]
		if c < '0' || c > '9' {
			return 0, false
		}
		n = n*10 + int(c-'0')
	}
	return n, true
}

func daysIn(month, year int) int {
	switch month {
	case 2:
		if year%4 == 0 && (year%100 != 0 || year%400 == 0) {
			return 29
		}
		return 28
	case 4, 6, 9, 11:
		return 30
	}
	return 31
}

// daysFromCivil returns the number of days from 1970-01-01 to the given
// proleptic Gregorian date (Howard Hinnant's days_from_civil algorithm).
func daysFromCivil(y, m, d int) int64 {
	if m <= 2 {
		y--
	}
	era := y / 400
	if y < 0 && y%400 != 0 {
		era--
	}
	yoe := y - era*400
	mp := (m + 9) % 12
	doy := (153*mp+2)/5 + d - 1
	doe := yoe*365 + yoe/4 - yoe/100 + doy
	return int64(era)*146097 + int64(doe) - 719468
}

// seconds returns the wall clock as seconds since 1970-01-01 00:00:00 read
// as if it were UTC.
func (w *wallTime) seconds() int64 {
	return daysFromCivil(w.year, w.month, w.day)*86400 +
		int64(w.hour*3600+w.min*60+w.sec)
}

// zoneResolver turns zone-less wall-clock times into instants in one
// location. It remembers the zone period of its last answer, so a file of
// times far from any clock change costs a subtraction per row.
type zoneResolver struct {
	loc        *time.Location
	valid      bool
	start, end int64 // the cached period, as Unix seconds; end exclusive
	offset     int64
}

// margin is wider than any change of a zone's offset (Samoa skipped a whole
// day in 2011), so a wall time this far inside a zone period cannot also
// belong to a neighbouring one.
const margin = 26 * 3600

// resolve returns the instants (Unix seconds) whose wall clock in the
// location is wall: none in a gap (clocks jumped forward), two in a repeated
// stretch (clocks went back), one otherwise. The result is written to dst.
func (z *zoneResolver) resolve(dst *[2]int64, wall int64) int {
	if z.valid {
		c := wall - z.offset
		if c >= z.start+margin && c < z.end-margin {
			dst[0] = c
			return 1
		}
	}
	n := 0
	// Walk the zone periods that overlap [wall−2 days, wall+2 days].
	i := wall - 2*86400
	for step := 0; step < 16; step++ {
		t := time.Unix(i, 0).In(z.loc)
		_, off := t.Zone()
		s, e := t.ZoneBounds()
		start, end := int64(math.MinInt64), int64(math.MaxInt64)
		if !s.IsZero() {
			start = s.Unix()
		}
		if !e.IsZero() {
			end = e.Unix()
		}
		c := wall - int64(off)
		if c >= start && c < end && n < 2 && (n == 0 || dst[0] != c) {
			dst[n] = c
			n++
			z.valid, z.start, z.end, z.offset = true, start, end, int64(off)
		}
		if end == math.MaxInt64 || end > wall+2*86400 {
			break
		}
		i = end
	}
	if n == 2 {
		// The cache must not answer for a wall time with two instants.
		z.valid = false
		if dst[1] < dst[0] {
			dst[0], dst[1] = dst[1], dst[0]
		}
	}
	return n
}

// parseSeconds parses a decimal number of seconds, exactly to the
// nanosecond when it is written without an exponent ("1714000000.125",
// "-3,5" with decimalComma). Numbers with an exponent go through
// strconv.ParseFloat. It refuses NaN, infinities and magnitudes beyond
// about ±290 years of nanoseconds from the origin of the count.
func parseSeconds[T string | []byte](s T, decimalComma bool) (sec, nsec int64, ok bool) {
	sep := byte('.')
	if decimalComma {
		sep = ','
	}
	exp := false
	for i := 0; i < len(s); i++ {
		exp = exp || s[i] == 'e' || s[i] == 'E'
	}
	if exp {
		str := string(s)
		if decimalComma {
			str = strings.Replace(str, ",", ".", 1)
		}
		f, err := strconv.ParseFloat(str, 64)
		if err != nil || math.IsNaN(f) || math.IsInf(f, 0) || math.Abs(f) > maxSeconds {
			return 0, 0, false
		}
		fl := math.Floor(f)
		ns := math.Round((f - fl) * 1e9)
		sec, nsec = int64(fl), int64(ns)
		if nsec == 1e9 {
			sec, nsec = sec+1, 0
		}
		return sec, nsec, true
	}
	i := 0
	neg := false
	if i < len(s) && (s[i] == '+' || s[i] == '-') {
		neg = s[i] == '-'
		i++
	}
	nd := 0
	for ; i < len(s) && s[i] >= '0' && s[i] <= '9'; i++ {
		sec = sec*10 + int64(s[i]-'0')
		nd++
		if sec > maxSeconds {
			return 0, 0, false
		}
	}
	nf := 0
	if i < len(s) && s[i] == sep {
		i++
		scale := int64(100_000_000)
		for ; i < len(s) && s[i] >= '0' && s[i] <= '9'; i++ {
			nsec += int64(s[i]-'0') * scale
			scale /= 10
			nf++
		}
	}
	if i != len(s) || nd+nf == 0 {
		return 0, 0, false
	}
	if neg && (sec != 0 || nsec != 0) {
		sec = -sec
		if nsec != 0 {
			sec--
			nsec = 1e9 - nsec
		}
	}
	return sec, nsec, true
}

// maxSeconds bounds a numeric time so that an offset from any origin stays
// representable as a time.Duration-sized count of nanoseconds.
const maxSeconds = 9e9
