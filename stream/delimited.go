package stream

import (
	"bytes"
	"strconv"
	"strings"
)

// DelimitedDecoder decodes one line of delimited text (CSV or TSV) into an
// Event, with columns named by a header line.
//
// The header names the columns user, item, value, time, event_id and kind, in
// any order, compared without regard to case or surrounding spaces (a UTF-8
// byte order mark before the first name is ignored). user and item are
// required; value is required for explicit ratings; the others are optional.
// Columns with other names are ignored. An empty field counts as absent: an
// empty value defaults to 1 in implicit mode, an empty time follows
// DecodeOptions.RequireTime, an empty kind is an interaction.
//
// With sep ',' fields follow RFC 4180: a field may be enclosed in double
// quotes, inside which the separator is literal and a doubled quote stands for
// one quote. A record is one line, so a quoted field cannot span lines. With
// any other separator (TSV: '\t') fields are taken literally, without quoting.
// Every record must have as many fields as the header. Numeric fields may be
// padded with spaces; IDs are taken as they are. The value is a JSON-style
// decimal number; the time is epoch milliseconds or an RFC 3339 timestamp.
//
// Decoding a valid record does not allocate once b has capacity.
type DelimitedDecoder struct {
	o       DecodeOptions
	sep     byte
	quoted  bool
	cols    []column // one per header column
	fields  [][]byte // fields of the current record
	scratch []byte   // unquoted fields
	last    int64
	r       rawEvent
}

type column uint8

const (
	colIgnored column = iota
	colUser
	colItem
	colValue
	colTime
	colEventID
	colKind
)

var _ Decoder = (*DelimitedDecoder)(nil)

// NewDelimitedDecoder parses the header line (without its line ending) and
// returns a decoder for the records that follow it. sep is ',' for CSV or
// '\t' for TSV. It returns a *DecodeError naming the column when the header
// is unusable.
func NewDelimitedDecoder(header []byte, sep byte, o DecodeOptions) (*DelimitedDecoder, error) {
	if sep == '"' || sep == '\n' || sep == '\r' || sep == 0 {
		return nil, &DecodeError{Where: "header", Reason: "bad separator " + strconv.QuoteRune(rune(sep))}
	}
	d := &DelimitedDecoder{o: o, sep: sep, quoted: sep == ','}
	header = bytes.TrimPrefix(header, []byte("\xef\xbb\xbf"))
	header = bytes.TrimSuffix(header, []byte("\r"))
	names, err := d.split(header, nil)
	if err != nil {
		err.Where = "header"
		return nil, err
	}
	seen := map[column]bool{}
	for _, n := range names {
		var c column
		switch strings.ToLower(string(bytes.TrimSpace(n))) {
		case fieldUser:
			c = colUser
		case fieldItem:
			c = colItem
		case fieldValue:
			c = colValue
		case fieldTime:
			c = colTime
		case fieldEventID:
			c = colEventID
		case fieldKind:
			c = colKind
		}
		if c != colIgnored {
			if seen[c] {
				return nil, &DecodeError{Where: "header", Field: strings.ToLower(string(bytes.TrimSpace(n))), Reason: "column named twice"}
			}
			seen[c] = true
		}
		d.cols = append(d.cols, c)
	}
	if !seen[colUser] {
		return nil, &DecodeError{Where: "header", Field: fieldUser, Reason: "no such column"}
	}
	if !seen[colItem] {
		return nil, &DecodeError{Where: "header", Field: fieldItem, Reason: "no such column"}
	}
	if !seen[colValue] && !o.Implicit {
		return nil, &DecodeError{Where: "header", Field: fieldValue, Reason: "no such column (explicit ratings need a value)"}
	}
	d.fields = make([][]byte, 0, len(d.cols))
	d.scratch = make([]byte, 0, 4*MaxIDLen)
	return d, nil
}

// Columns returns the number of columns the header named.
func (d *DelimitedDecoder) Columns() int { return len(d.cols) }

// split cuts rec into fields, appending them to dst. Unquoted fields are
// slices of rec; quoted fields are unquoted into the scratch buffer.
func (d *DelimitedDecoder) split(rec []byte, dst [][]byte) ([][]byte, *DecodeError) {
	i := 0
	for {
		if !d.quoted || i >= len(rec) || rec[i] != '"' {
			j := bytes.IndexByte(rec[i:], d.sep)
			if j < 0 {
				dst = append(dst, rec[i:])
				return dst, nil
			}
			dst = append(dst, rec[i:i+j])
			i += j + 1
			continue
		}
		// Quoted field (RFC 4180 section 2, rules 5 to 7).
		i++
		s0 := len(d.scratch)
		for {
			j := bytes.IndexByte(rec[i:], '"')
			if j < 0 {
				return dst, &DecodeError{Reason: "unterminated quoted field " + strconv.Itoa(len(dst)+1)}
			}
			d.scratch = append(d.scratch, rec[i:i+j]...)
			i += j + 1
			if i < len(rec) && rec[i] == '"' {
				d.scratch = append(d.scratch, '"')
				i++
				continue
			}
			break
		}
		dst = append(dst, d.scratch[s0:len(d.scratch):len(d.scratch)])
		if i == len(rec) {
			return dst, nil
		}
		if rec[i] != d.sep {
			return dst, &DecodeError{Reason: "text after closing quote in field " + strconv.Itoa(len(dst))}
		}
		i++
	}
}

// Decode decodes one delimited record (a line without its ending; a trailing
// '\r' is dropped) and appends the event to b. On error it returns a
// *DecodeError and b is unchanged.
func (d *DelimitedDecoder) Decode(rec []byte, b *Batch) error {
	if n := len(rec); n > 0 && rec[n-1] == '\r' {
		rec = rec[:n-1]
	}
	d.scratch = d.scratch[:0]
	fields, err := d.split(rec, d.fields[:0])
	if err != nil {
		return err
	}
	if len(fields) != len(d.cols) {
		return &DecodeError{Reason: "record has " + strconv.Itoa(len(fields)) + " fields, header has " + strconv.Itoa(len(d.cols))}
	}
	d.fields = fields[:0]
	r := &d.r
	r.reset()
	for k, f := range fields {
		switch d.cols[k] {
		case colUser:
			r.user = f
		case colItem:
			r.item = f
		case colEventID:
			r.eventID = f
		case colValue:
			f = bytes.TrimSpace(f)
			if len(f) == 0 {
				continue
			}
			if n := numberLen(f); n == 0 || n != len(f) {
				return badField(fieldValue, "not a number: "+strconv.QuoteToASCII(truncate(f, 40)))
			}
			v, ok := parseFloat(f)
			if !ok {
				return badField(fieldValue, "not a number")
			}
			r.value, r.hasValue = v, true
		case colTime:
			f = bytes.TrimSpace(f)
			if len(f) == 0 {
				continue
			}
			t, err := parseTimeText(f)
			if err != nil {
				return err
			}
			r.time, r.hasTime = t, true
		case colKind:
			k, err := parseKind(bytes.TrimSpace(f))
			if err != nil {
				return err
			}
			r.kind = k
		}
	}
	return d.o.finish(r, &d.last, b)
}
