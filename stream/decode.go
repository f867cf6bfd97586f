package stream

import (
	"math"
	"strconv"
	"unicode/utf8"
	"unsafe"
)

// Wire field names shared by the JSON and delimited forms. A JSON record is one
// object:
//
//	{"user":"listener-17","item":"show-4","value":4.5,"time":1767225600000,"event_id":"e1"}
//	{"user":"listener-17","kind":"erase_user","time":"2026-01-01T00:00:00Z"}
//
// A delimited file (CSV or TSV) starts with a header line naming the same
// columns in any order.
const (
	fieldUser    = "user"
	fieldItem    = "item"
	fieldValue   = "value"
	fieldTime    = "time"
	fieldEventID = "event_id"
	fieldKind    = "kind"
)

// Time bounds accepted on the wire, in milliseconds since the Unix epoch: the
// years 0000 to 9999, the range an RFC 3339 timestamp can spell.
const (
	minTimeMillis = -62167219200000 // 0000-01-01T00:00:00Z
	maxTimeMillis = 253402300799999 // 9999-12-31T23:59:59.999Z
)

// DecodeOptions say how records are validated. The zero value decodes explicit
// ratings on any finite scale, with an optional time.
type DecodeOptions struct {
	// Implicit selects positive-only feedback: the value is optional, defaults
	// to 1, and must be finite and greater than 0. When false (explicit
	// ratings) every interaction must carry a value.
	Implicit bool
	// MinValue and MaxValue bound the value when MaxValue > MinValue; a value
	// outside [MinValue, MaxValue] is an error naming "value". When both are
	// zero any finite value is accepted.
	MinValue, MaxValue float64
	// RequireTime makes a missing time an error naming "time". When false, a
	// record without a time takes the time of the previous event the same
	// decoder accepted (0 before the first), so that model time never runs
	// backwards because a producer left the field out.
	RequireTime bool
}

// rawEvent holds the fields of one record as found, before validation.
type rawEvent struct {
	user, item, eventID []byte
	value               float64
	time                int64
	kind                Kind
	hasValue, hasTime   bool
}

func (r *rawEvent) reset() { *r = rawEvent{} }

// badField returns a *DecodeError naming field. It allocates, but only on the
// error path.
func badField(field, reason string) *DecodeError {
	return &DecodeError{Field: field, Reason: reason}
}

// finish validates r against o and appends the event to b. last is the time
// of the previous accepted event, updated on success.
func (o *DecodeOptions) finish(r *rawEvent, last *int64, b *Batch) error {
	switch r.kind {
	case Interaction:
		if err := checkID(fieldUser, r.user); err != nil {
			return err
		}
		if err := checkID(fieldItem, r.item); err != nil {
			return err
		}
		if !r.hasValue {
			if !o.Implicit {
				return badField(fieldValue, "missing (explicit ratings need a value)")
			}
			r.value = 1
		}
		if math.IsNaN(r.value) || math.IsInf(r.value, 0) {
			return badField(fieldValue, "not finite")
		}
		if o.Implicit && r.value <= 0 {
			return badField(fieldValue, "must be greater than 0 for implicit feedback, got "+
				strconv.FormatFloat(r.value, 'g', -1, 64))
		}
		if o.MaxValue > o.MinValue && (r.value < o.MinValue || r.value > o.MaxValue) {
			return badField(fieldValue, "out of scale ["+strconv.FormatFloat(o.MinValue, 'g', -1, 64)+", "+
				strconv.FormatFloat(o.MaxValue, 'g', -1, 64)+"]: "+strconv.FormatFloat(r.value, 'g', -1, 64))
		}
	case EraseUser:
		if err := checkID(fieldUser, r.user); err != nil {
			return err
		}
		if len(r.item) > 0 {
			if err := checkID(fieldItem, r.item); err != nil {
				return err
			}
		}
		r.value = 0
	case EraseItem:
		if err := checkID(fieldItem, r.item); err != nil {
			return err
		}
		if len(r.user) > 0 {
			if err := checkID(fieldUser, r.user); err != nil {
				return err
			}
		}
		r.value = 0
	}
	if len(r.eventID) > 0 {
		if err := checkID(fieldEventID, r.eventID); err != nil {
			return err
		}
	}
	if !r.hasTime {
		if o.RequireTime {
			return badField(fieldTime, "missing")
		}
		r.time = *last
	}
	*last = r.time
	b.Add(Event{User: r.user, Item: r.item, EventID: r.eventID, Value: r.value, Time: r.time, Kind: r.kind})
	return nil
}

// checkID validates a user, item or event ID: 1 to MaxIDLen bytes of valid
// UTF-8 without control characters.
func checkID(field string, id []byte) error {
	if len(id) == 0 {
		return badField(field, "missing or empty")
	}
	if len(id) > MaxIDLen {
		return badField(field, "longer than "+strconv.Itoa(MaxIDLen)+" bytes ("+strconv.Itoa(len(id))+")")
	}
	ascii := true
	for _, c := range id {
		if c < 0x20 || c == 0x7f {
			return badField(field, "contains a control character")
		}
		if c >= utf8.RuneSelf {
			ascii = false
		}
	}
	if !ascii && !utf8.Valid(id) {
		return badField(field, "not valid UTF-8")
	}
	return nil
}

// parseKind maps a wire kind name to a Kind. An empty name is an interaction.
func parseKind(s []byte) (Kind, error) {
	switch string(s) {
	case "", "interaction":
		return Interaction, nil
	case "erase_user":
		return EraseUser, nil
	case "erase_item":
		return EraseItem, nil
	}
	return 0, badField(fieldKind, "unknown kind "+strconv.QuoteToASCII(truncate(s, 40)))
}

func truncate(s []byte, n int) string {
	if len(s) > n {
		return string(s[:n]) + "..."
	}
	return string(s)
}

// numberLen returns the length of the JSON number at the start of b (RFC 8259
// section 6: -?(0|[1-9][0-9]*)(\.[0-9]+)?([eE][+-]?[0-9]+)?), or 0 if b does not
// start with one.
func numberLen(b []byte) int {
	i := 0
	if i < len(b) && b[i] == '-' {
		i++
	}
	if i >= len(b) {
		return 0
	}
	switch {
	case b[i] == '0':
		i++
	case b[i] >= '1' && b[i] <= '9':
		for i < len(b) && b[i] >= '0' && b[i] <= '9' {
			i++
		}
	default:
		return 0
	}
	if i < len(b) && b[i] == '.' {
		i++
		start := i
		for i < len(b) && b[i] >= '0' && b[i] <= '9' {
			i++
		}
		if i == start {
			return 0
		}
	}
	if i < len(b) && (b[i] == 'e' || b[i] == 'E') {
		i++
		if i < len(b) && (b[i] == '+' || b[i] == '-') {
			i++
		}
		start := i
		for i < len(b) && b[i] >= '0' && b[i] <= '9' {
			i++
		}
		if i == start {
			return 0
		}
	}
	return i
}

// parseFloat converts a validated number lexeme. strconv.ParseFloat does not
// retain its argument (its errors copy the string), so viewing the bytes as a
// string without copying is safe and keeps decoding free of allocations.
func parseFloat(num []byte) (float64, bool) {
	if len(num) == 0 {
		return 0, false
	}
	v, err := strconv.ParseFloat(unsafe.String(&num[0], len(num)), 64)
	if err != nil {
		// Out of range: ParseFloat returns ±Inf, which validation rejects as
		// not finite; any other error cannot happen for a valid lexeme.
		if ne, ok := err.(*strconv.NumError); ok && ne.Err == strconv.ErrRange {
			return v, true
		}
		return 0, false
	}
	return v, true
}

// parseTimeNumber converts a number lexeme to whole milliseconds. Integers are
// parsed exactly; other forms (1.7672256e12) must be integral.
func parseTimeNumber(num []byte) (int64, error) {
	neg := false
	digits := num
	if len(digits) > 0 && digits[0] == '-' {
		neg = true
		digits = digits[1:]
	}
	integer := len(digits) > 0
	for _, c := range digits {
		if c < '0' || c > '9' {
			integer = false
			break
		}
	}
	if integer {
		if len(digits) > 18 {
			return 0, badField(fieldTime, "out of range (years 0000 to 9999 in milliseconds)")
		}
		var t int64
		for _, c := range digits {
			t = t*10 + int64(c-'0')
		}
		if neg {
			t = -t
		}
		if t < minTimeMillis || t > maxTimeMillis {
			return 0, badField(fieldTime, "out of range (years 0000 to 9999 in milliseconds)")
		}
		return t, nil
	}
	f, ok := parseFloat(num)
	if !ok {
		return 0, badField(fieldTime, "not a number")
	}
	if f != math.Trunc(f) {
		return 0, badField(fieldTime, "not whole milliseconds")
	}
	if f < minTimeMillis || f > maxTimeMillis {
		return 0, badField(fieldTime, "out of range (years 0000 to 9999 in milliseconds)")
	}
	return int64(f), nil
}

// parseRFC3339 converts an RFC 3339 timestamp (RFC 3339 section 5.6:
// YYYY-MM-DDTHH:MM:SS[.frac](Z|±HH:MM); "t" and "z" accepted in lower case) to
// milliseconds since the epoch. Fractions finer than a millisecond are
// truncated toward the earlier instant. Leap seconds (second 60) are rejected,
// as Go's time package does.
func parseRFC3339(s []byte) (int64, error) {
	bad := func(why string) error { return badField(fieldTime, "bad RFC 3339 timestamp: "+why) }
	if len(s) < 19 {
		return 0, bad("too short")
	}
	num := func(p []byte) (int, bool) {
		n := 0
		for _, c := range p {
			if c < '0' || c > '9' {
				return 0, false
			}
			n = n*10 + int(c-'0')
		}
		return n, true
	}
	year, ok1 := num(s[0:4])
	month, ok2 := num(s[5:7])
	day, ok3 := num(s[8:10])
	hour, ok4 := num(s[11:13])
	minute, ok5 := num(s[14:16])
	sec, ok6 := num(s[17:19])
	if !(ok1 && ok2 && ok3 && ok4 && ok5 && ok6) || s[4] != '-' || s[7] != '-' ||
		(s[10] != 'T' && s[10] != 't') || s[13] != ':' || s[16] != ':' {
		return 0, bad("want YYYY-MM-DDTHH:MM:SS")
	}
	if month < 1 || month > 12 {
		return 0, bad("month out of range")
	}
	if day < 1 || day > daysIn(year, month) {
		return 0, bad("day out of range")
	}
	if hour > 23 || minute > 59 || sec > 59 {
		return 0, bad("time of day out of range")
	}
	i := 19
	var millis int64
	if i < len(s) && s[i] == '.' {
		i++
		start := i
		for i < len(s) && s[i] >= '0' && s[i] <= '9' {
			if i-start < 3 {
				millis = millis*10 + int64(s[i]-'0')
			}
			i++
		}
		if i == start {
			return 0, bad("empty fraction")
		}
		for d := i - start; d < 3; d++ {
			millis *= 10
		}
	}
	if i >= len(s) {
		return 0, bad("missing zone")
	}
	offset := 0 // minutes east of UTC
	switch s[i] {
	case 'Z', 'z':
		i++
	case '+', '-':
		if len(s)-i != 6 || s[i+3] != ':' {
			return 0, bad("zone offset want ±HH:MM")
		}
		oh, okh := num(s[i+1 : i+3])
		om, okm := num(s[i+4 : i+6])
		if !okh || !okm || oh > 23 || om > 59 {
			return 0, bad("zone offset out of range")
		}
		offset = oh*60 + om
		if s[i] == '-' {
			offset = -offset
		}
		i += 6
	default:
		return 0, bad("missing zone")
	}
	if i != len(s) {
		return 0, bad("trailing characters")
	}
	days := daysFromCivil(int64(year), int64(month), int64(day))
	secs := days*86400 + int64(hour)*3600 + int64(minute)*60 + int64(sec) - int64(offset)*60
	t := secs*1000 + millis
	if t < minTimeMillis || t > maxTimeMillis {
		return 0, badField(fieldTime, "out of range (years 0000 to 9999 in milliseconds)")
	}
	return t, nil
}

func daysIn(year, month int) int {
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

// daysFromCivil returns the number of days from 1970-01-01 to the given date
// of the proleptic Gregorian calendar. It counts whole 400-year eras of
// 146097 days from 0000-03-01, with the year starting in March so that the
// leap day falls last:
//
//	y' = y − [m ≤ 2],  era = ⌊y'/400⌋,  yoe = y' − 400·era
//	doy = ⌊(153·((m + 9) mod 12) + 2)/5⌋ + d − 1
//	doe = 365·yoe + ⌊yoe/4⌋ − ⌊yoe/100⌋ + doy
//	days = 146097·era + doe − 719468
//
// (H. Hinnant, "chrono-Compatible Low-Level Date Algorithms", days_from_civil;
// 719468 is the day number of 1970-01-01 counted from 0000-03-01).
func daysFromCivil(y, m, d int64) int64 {
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
	return era*146097 + doe - 719468
}

// looksLikeRFC3339 reports whether a delimited time field is a timestamp
// string rather than a number: four digits followed by '-'.
func looksLikeRFC3339(s []byte) bool {
	return len(s) > 4 && s[4] == '-' && s[0] >= '0' && s[0] <= '9'
}

// parseTimeText converts a textual time (a JSON string or a delimited field):
// an RFC 3339 timestamp, or epoch milliseconds written as a number.
func parseTimeText(s []byte) (int64, error) {
	if looksLikeRFC3339(s) {
		return parseRFC3339(s)
	}
	if n := numberLen(s); n > 0 && n == len(s) {
		return parseTimeNumber(s)
	}
	return 0, badField(fieldTime, "want epoch milliseconds or an RFC 3339 timestamp")
}
