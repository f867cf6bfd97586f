package stream

import (
	"strconv"
	"unicode/utf16"
	"unicode/utf8"
)

// maxJSONDepth bounds the nesting of skipped values, so that a hostile record
// cannot exhaust the stack.
const maxJSONDepth = 64

// JSONDecoder decodes one JSON object per record (RFC 8259) into an Event.
//
// Recognised keys are user, item, value, time, event_id and kind; every other
// key is skipped with its value, whatever its type or nesting (up to 64
// levels). Keys are compared after unescaping ("us\u0065r" is user). A known
// key given twice is an error naming it (duplicate keys are ambiguous: two
// readers may take different ones), and a known key whose value is null counts
// as absent.
//
// Field types: user, item and event_id are strings (a number is accepted and
// its literal text becomes the ID); value is a number; time is a number of
// milliseconds since the epoch (any JSON number form, if integral) or a string
// holding an RFC 3339 timestamp or such a number; kind is "interaction" (the
// default), "erase_user" or "erase_item". Escapes (\n, \uXXXX, surrogate pairs)
// are decoded into a scratch buffer owned by the decoder; a lone surrogate is
// an error. Nothing but white space may follow the object.
//
// Decoding a valid record does not allocate once b has capacity.
type JSONDecoder struct {
	o       DecodeOptions
	scratch []byte
	last    int64
	p       jsonParser
	r       rawEvent
}

// NewJSONDecoder returns a decoder that validates records with o.
func NewJSONDecoder(o DecodeOptions) *JSONDecoder {
	return &JSONDecoder{o: o, scratch: make([]byte, 0, 4*MaxIDLen)}
}

var _ Decoder = (*JSONDecoder)(nil)

type jsonParser struct {
	b []byte
	i int
}

func (p *jsonParser) ws() {
	for p.i < len(p.b) {
		switch p.b[p.i] {
		case ' ', '\t', '\n', '\r':
			p.i++
		default:
			return
		}
	}
}

// syntax returns the error for malformed JSON at the current offset.
func (p *jsonParser) syntax(what string) *DecodeError {
	if p.i >= len(p.b) {
		return &DecodeError{Reason: "not JSON: unexpected end of record, " + what}
	}
	return &DecodeError{Reason: "not JSON: unexpected " + quoteByte(p.b[p.i]) + " at byte " +
		strconv.Itoa(p.i) + ", " + what}
}

func quoteByte(c byte) string {
	if c >= 0x20 && c < 0x7f {
		return strconv.QuoteRune(rune(c))
	}
	return "byte 0x" + strconv.FormatUint(uint64(c), 16)
}

// Decode decodes the JSON object in rec and appends the event to b. On error
// it returns a *DecodeError (Where left empty for the caller) and b is unchanged.
func (d *JSONDecoder) Decode(rec []byte, b *Batch) error {
	d.scratch = d.scratch[:0]
	d.p = jsonParser{b: rec}
	d.r.reset()
	p := &d.p
	r := &d.r
	p.ws()
	if p.i >= len(p.b) || p.b[p.i] != '{' {
		return p.syntax("want '{'")
	}
	p.i++
	p.ws()
	var seen uint8 // bit per known key
	if p.i < len(p.b) && p.b[p.i] == '}' {
		p.i++
	} else {
		for {
			p.ws()
			if p.i >= len(p.b) || p.b[p.i] != '"' {
				return p.syntax("want a key string")
			}
			key, err := d.str("")
			if err != nil {
				return err
			}
			p.ws()
			if p.i >= len(p.b) || p.b[p.i] != ':' {
				return p.syntax("want ':'")
			}
			p.i++
			p.ws()
			var bit uint8
			var field string
			switch string(key) {
			case fieldUser:
				bit, field = 1, fieldUser
			case fieldItem:
				bit, field = 2, fieldItem
			case fieldValue:
				bit, field = 4, fieldValue
			case fieldTime:
				bit, field = 8, fieldTime
			case fieldEventID:
				bit, field = 16, fieldEventID
			case fieldKind:
				bit, field = 32, fieldKind
			}
			if bit == 0 {
				if err := d.skip(0); err != nil {
					return err
				}
			} else {
				if seen&bit != 0 {
					return badField(field, "duplicate key")
				}
				seen |= bit
				if err := d.field(field); err != nil {
					return err
				}
			}
			p.ws()
			if p.i >= len(p.b) {
				return p.syntax("want ',' or '}'")
			}
			if p.b[p.i] == ',' {
				p.i++
				continue
			}
			if p.b[p.i] == '}' {
				p.i++
				break
			}
			return p.syntax("want ',' or '}'")
		}
	}
	p.ws()
	if p.i != len(p.b) {
		return p.syntax("want end of record after the object")
	}
	return d.o.finish(r, &d.last, b)
}

// field decodes the value of a known key.
func (d *JSONDecoder) field(field string) error {
	p := &d.p
	r := &d.r
	if p.i >= len(p.b) {
		return p.syntax("want a value")
	}
	c := p.b[p.i]
	if c == 'n' {
		return d.literal("null")
	}
	switch field {
	case fieldUser, fieldItem, fieldEventID:
		var id []byte
		switch {
		case c == '"':
			s, err := d.str(field)
			if err != nil {
				return err
			}
			id = s
		case c == '-' || (c >= '0' && c <= '9'):
			n := numberLen(p.b[p.i:])
			if n == 0 {
				return p.syntax("bad number")
			}
			id = p.b[p.i : p.i+n]
			p.i += n
		default:
			if err := d.skip(0); err != nil {
				return err
			}
			return badField(field, "must be a string")
		}
		switch field {
		case fieldUser:
			r.user = id
		case fieldItem:
			r.item = id
		default:
			r.eventID = id
		}
	case fieldValue:
		if c != '-' && (c < '0' || c > '9') {
			if err := d.skip(0); err != nil {
				return err
			}
			return badField(field, "must be a number")
		}
		n := numberLen(p.b[p.i:])
		if n == 0 {
			return p.syntax("bad number")
		}
		v, ok := parseFloat(p.b[p.i : p.i+n])
		if !ok {
			return badField(field, "bad number")
		}
		p.i += n
		r.value, r.hasValue = v, true
	case fieldTime:
		var err error
		switch {
		case c == '"':
			var s []byte
			if s, err = d.str(field); err != nil {
				return err
			}
			r.time, err = parseTimeText(s)
		case c == '-' || (c >= '0' && c <= '9'):
			n := numberLen(p.b[p.i:])
			if n == 0 {
				return p.syntax("bad number")
			}
			r.time, err = parseTimeNumber(p.b[p.i : p.i+n])
			p.i += n
		default:
			if err := d.skip(0); err != nil {
				return err
			}
			return badField(field, "must be a number or a string")
		}
		if err != nil {
			return err
		}
		r.hasTime = true
	case fieldKind:
		if c != '"' {
			if err := d.skip(0); err != nil {
				return err
			}
			return badField(field, "must be a string")
		}
		s, err := d.str(field)
		if err != nil {
			return err
		}
		if r.kind, err = parseKind(s); err != nil {
			return err
		}
	}
	return nil
}

func (d *JSONDecoder) literal(word string) error {
	p := &d.p
	if len(p.b)-p.i < len(word) || string(p.b[p.i:p.i+len(word)]) != word {
		return p.syntax("bad literal")
	}
	p.i += len(word)
	return nil
}

// str decodes the string starting at the opening quote. It returns a slice of
// the record when the string has no escapes, else a slice of the scratch
// buffer. field names the key whose value this is ("" for keys and skipped
// values) for escape errors.
func (d *JSONDecoder) str(field string) ([]byte, error) {
	p := &d.p
	p.i++ // opening quote
	start := p.i
	for p.i < len(p.b) {
		for p.i < len(p.b) && !strSpecial[p.b[p.i]] {
			p.i++
		}
		if p.i >= len(p.b) {
			break
		}
		c := p.b[p.i]
		if c == '"' {
			s := p.b[start:p.i]
			p.i++
			return s, nil
		}
		if c == '\\' {
			break
		}
		if c < 0x20 {
			return nil, p.syntax("control character in string")
		}
		p.i++
	}
	if p.i >= len(p.b) {
		return nil, p.syntax("unterminated string")
	}
	// Escapes: copy into scratch. Earlier strings of this record keep pointing
	// at the old backing array if append must grow it; it is not written again.
	s0 := len(d.scratch)
	d.scratch = append(d.scratch, p.b[start:p.i]...)
	for p.i < len(p.b) {
		c := p.b[p.i]
		switch {
		case c == '"':
			p.i++
			return d.scratch[s0:len(d.scratch):len(d.scratch)], nil
		case c < 0x20:
			return nil, p.syntax("control character in string")
		case c != '\\':
			d.scratch = append(d.scratch, c)
			p.i++
			continue
		}
		if p.i+1 >= len(p.b) {
			p.i++
			return nil, p.syntax("unterminated escape")
		}
		e := p.b[p.i+1]
		p.i += 2
		switch e {
		case '"', '\\', '/':
			d.scratch = append(d.scratch, e)
		case 'b':
			d.scratch = append(d.scratch, '\b')
		case 'f':
			d.scratch = append(d.scratch, '\f')
		case 'n':
			d.scratch = append(d.scratch, '\n')
		case 'r':
			d.scratch = append(d.scratch, '\r')
		case 't':
			d.scratch = append(d.scratch, '\t')
		case 'u':
			r1, ok := hex4(p.b[p.i:])
			if !ok {
				return nil, p.syntax("bad \\u escape")
			}
			p.i += 4
			r := rune(r1)
			if utf16.IsSurrogate(r) {
				// A high surrogate must be followed by \u and a low one
				// (RFC 8259 section 7).
				if r1 >= 0xdc00 || len(p.b)-p.i < 6 || p.b[p.i] != '\\' || p.b[p.i+1] != 'u' {
					return nil, escapeErr(field, "lone surrogate in \\u escape")
				}
				r2, ok := hex4(p.b[p.i+2:])
				if !ok {
					return nil, p.syntax("bad \\u escape")
				}
				r = utf16.DecodeRune(r, rune(r2))
				if r == utf8.RuneError {
					return nil, escapeErr(field, "lone surrogate in \\u escape")
				}
				p.i += 6
			}
			d.scratch = utf8.AppendRune(d.scratch, r)
		default:
			p.i--
			return nil, p.syntax("bad escape")
		}
	}
	return nil, p.syntax("unterminated string")
}

func escapeErr(field, reason string) *DecodeError {
	if field == "" {
		return &DecodeError{Reason: "not JSON: " + reason}
	}
	return badField(field, reason)
}

func hex4(b []byte) (uint16, bool) {
	if len(b) < 4 {
		return 0, false
	}
	var v uint16
	for _, c := range b[:4] {
		v <<= 4
		switch {
		case c >= '0' && c <= '9':
			v |= uint16(c - '0')
		case c >= 'a' && c <= 'f':
			v |= uint16(c - 'a' + 10)
		case c >= 'A' && c <= 'F':
			v |= uint16(c - 'A' + 10)
		default:
			return 0, false
		}
	}
	return v, true
}

// strSpecial marks the bytes that end the plain run of a JSON string: the
// quote, the backslash and the control characters.
var strSpecial = func() (t [256]bool) {
	for c := range 0x20 {
		t[c] = true
	}
	t['"'], t['\\'] = true, true
	return t
}()

// skip checks and passes over one JSON value of any type.
func (d *JSONDecoder) skip(depth int) error {
	p := &d.p
	if depth > maxJSONDepth {
		return &DecodeError{Reason: "not JSON: nesting deeper than " + strconv.Itoa(maxJSONDepth)}
	}
	p.ws()
	if p.i >= len(p.b) {
		return p.syntax("want a value")
	}
	switch c := p.b[p.i]; {
	case c == '"':
		// Validate without keeping: decode into scratch, then drop it.
		n := len(d.scratch)
		_, err := d.str("")
		d.scratch = d.scratch[:n]
		return err
	case c == '{':
		p.i++
		p.ws()
		if p.i < len(p.b) && p.b[p.i] == '}' {
			p.i++
			return nil
		}
		for {
			p.ws()
			if p.i >= len(p.b) || p.b[p.i] != '"' {
				return p.syntax("want a key string")
			}
			if err := d.skip(depth + 1); err != nil {
				return err
			}
			p.ws()
			if p.i >= len(p.b) || p.b[p.i] != ':' {
				return p.syntax("want ':'")
			}
			p.i++
			if err := d.skip(depth + 1); err != nil {
				return err
			}
			p.ws()
			if p.i < len(p.b) && p.b[p.i] == ',' {
				p.i++
				continue
			}
			if p.i < len(p.b) && p.b[p.i] == '}' {
				p.i++
				return nil
			}
			return p.syntax("want ',' or '}'")
		}
	case c == '[':
		p.i++
		p.ws()
		if p.i < len(p.b) && p.b[p.i] == ']' {
			p.i++
			return nil
		}
		for {
			if err := d.skip(depth + 1); err != nil {
				return err
			}
			p.ws()
			if p.i < len(p.b) && p.b[p.i] == ',' {
				p.i++
				continue
			}
			if p.i < len(p.b) && p.b[p.i] == ']' {
				p.i++
				return nil
			}
			return p.syntax("want ',' or ']'")
		}
	case c == 't':
		return d.literal("true")
	case c == 'f':
		return d.literal("false")
	case c == 'n':
		return d.literal("null")
	case c == '-' || (c >= '0' && c <= '9'):
		n := numberLen(p.b[p.i:])
		if n == 0 {
			return p.syntax("bad number")
		}
		p.i += n
		return nil
	}
	return p.syntax("want a value")
}

// AppendJSON appends ev to dst as one JSON object (no trailing newline) in the
// form JSONDecoder reads, and returns the extended slice. Keys are written in
// a fixed order; kind is omitted for an interaction, value for an erasure,
// and empty IDs are omitted. The value uses the shortest decimal form that
// reads back to the same float64, so decode → encode → decode is stable.
// Bytes of an ID that are not valid UTF-8 are written as U+FFFD (decoders
// never produce such IDs).
func AppendJSON(dst []byte, ev *Event) []byte {
	dst = append(dst, '{')
	sep := false
	key := func(k string) {
		if sep {
			dst = append(dst, ',')
		}
		sep = true
		dst = append(dst, '"')
		dst = append(dst, k...)
		dst = append(dst, '"', ':')
	}
	if len(ev.User) > 0 {
		key(fieldUser)
		dst = appendJSONString(dst, ev.User)
	}
	if len(ev.Item) > 0 {
		key(fieldItem)
		dst = appendJSONString(dst, ev.Item)
	}
	if ev.Kind == Interaction {
		key(fieldValue)
		dst = strconv.AppendFloat(dst, ev.Value, 'g', -1, 64)
	}
	key(fieldTime)
	dst = strconv.AppendInt(dst, ev.Time, 10)
	if len(ev.EventID) > 0 {
		key(fieldEventID)
		dst = appendJSONString(dst, ev.EventID)
	}
	if ev.Kind != Interaction {
		key(fieldKind)
		dst = append(dst, '"')
		dst = append(dst, ev.Kind.String()...)
		dst = append(dst, '"')
	}
	return append(dst, '}')
}

const hexDigits = "0123456789abcdef"

// appendJSONString appends s as a JSON string: quote, backslash and control
// characters escaped, invalid UTF-8 replaced by U+FFFD.
func appendJSONString(dst, s []byte) []byte {
	dst = append(dst, '"')
	for i := 0; i < len(s); {
		c := s[i]
		if c < utf8.RuneSelf {
			switch {
			case c == '"' || c == '\\':
				dst = append(dst, '\\', c)
			case c == '\n':
				dst = append(dst, '\\', 'n')
			case c == '\r':
				dst = append(dst, '\\', 'r')
			case c == '\t':
				dst = append(dst, '\\', 't')
			case c < 0x20 || c == 0x7f:
				dst = append(dst, '\\', 'u', '0', '0', hexDigits[c>>4], hexDigits[c&0xf])
			default:
				dst = append(dst, c)
			}
			i++
			continue
		}
		r, n := utf8.DecodeRune(s[i:])
		if r == utf8.RuneError && n == 1 {
			dst = append(dst, "\ufffd"...)
		} else {
			dst = append(dst, s[i:i+n]...)
		}
		i += n
	}
	return append(dst, '"')
}
