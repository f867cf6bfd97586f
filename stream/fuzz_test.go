package stream

import (
	"errors"
	"io"
	"testing"
)

// chunkReader returns its data in two reads, split at a given point, as a
// socket or a pipe might.
type chunkReader struct {
	parts [][]byte
}

func (r *chunkReader) Read(p []byte) (int, error) {
	for len(r.parts) > 0 && len(r.parts[0]) == 0 {
		r.parts = r.parts[1:]
	}
	if len(r.parts) == 0 {
		return 0, io.EOF
	}
	n := copy(p, r.parts[0])
	r.parts[0] = r.parts[0][n:]
	return n, nil
}

// decodeLines runs the file source's line splitting and decoding over r and
// returns the accepted events and the offsets and reasons of the rejected lines.
func decodeLines(t *testing.T, r io.Reader, dec Decoder) (evs []kept, rejects []string) {
	lr := newLineReader(r, 0)
	var b Batch
	for {
		line, off, st, err := lr.next(false)
		if err != nil {
			t.Fatalf("line reader: %v", err)
		}
		if st == lineEOF {
			return evs, rejects
		}
		b.Reset()
		if st == lineTooLong {
			rejects = append(rejects, "too long")
			continue
		}
		if err := dec.Decode(line, &b); err != nil {
			rejects = append(rejects, err.Error())
			continue
		}
		ev := keep(&b.Events[0])
		ev.Offset = off
		evs = append(evs, ev)
	}
}

func sameStreams(t *testing.T, a, b []kept, ra, rb []string) {
	t.Helper()
	if len(a) != len(b) || len(ra) != len(rb) {
		t.Fatalf("split input gave %d events and %d rejects, whole input %d and %d", len(b), len(rb), len(a), len(ra))
	}
	for i := range a {
		if a[i] != b[i] {
			t.Fatalf("event %d: whole %+v, split %+v", i, a[i], b[i])
		}
	}
	for i := range ra {
		if ra[i] != rb[i] {
			t.Fatalf("reject %d: whole %q, split %q", i, ra[i], rb[i])
		}
	}
}

// checkRoundTrip decodes the JSON encoding of ev with a fresh decoder and
// checks that it gives ev back and encodes to the same bytes.
func checkRoundTrip(t *testing.T, ev *Event, o DecodeOptions) {
	t.Helper()
	enc := AppendJSON(nil, ev)
	var b Batch
	if err := NewJSONDecoder(o).Decode(enc, &b); err != nil {
		t.Fatalf("re-decoding %s: %v", enc, err)
	}
	if !eventsEqual(ev, &b.Events[0]) {
		t.Fatalf("decode → encode → decode changed the event: %s became %s", enc, AppendJSON(nil, &b.Events[0]))
	}
	if again := AppendJSON(nil, &b.Events[0]); string(again) != string(enc) {
		t.Fatalf("encoding not stable: %s then %s", enc, again)
	}
}

func checkFailure(t *testing.T, err error, b *Batch) {
	t.Helper()
	var de *DecodeError
	if !errors.As(err, &de) || !errors.Is(err, ErrBadRecord) {
		t.Fatalf("error %v (%T) is not a *DecodeError", err, err)
	}
	if de.Reason == "" {
		t.Fatalf("error %v has no reason", err)
	}
	if b.Len() != 0 {
		t.Fatalf("failed Decode changed the batch")
	}
}

func FuzzJSONDecode(f *testing.F) {
	f.Add([]byte(`{"user":"listener-17","item":"show-4","value":4.5,"time":1767225600000,"event_id":"e1"}`), uint16(10))
	f.Add([]byte(`{"user":"a\ud83c\udfa7","item":"b","kind":"erase_user","x":[{"y":null}]}`+"\n{\"user\":1}\r\n"), uint16(40))
	f.Fuzz(func(t *testing.T, data []byte, split uint16) {
		for _, o := range []DecodeOptions{{}, {Implicit: true, MinValue: 0.5, MaxValue: 5}} {
			var b Batch
			if err := NewJSONDecoder(o).Decode(data, &b); err != nil {
				checkFailure(t, err, &b)
			} else {
				checkRoundTrip(t, &b.Events[0], o)
			}
			at := int(split) % (len(data) + 1)
			whole, rw := decodeLines(t, &chunkReader{parts: [][]byte{data}}, NewJSONDecoder(o))
			parts, rp := decodeLines(t, &chunkReader{parts: [][]byte{data[:at:at], data[at:]}}, NewJSONDecoder(o))
			sameStreams(t, whole, parts, rw, rp)
		}
	})
}

func FuzzDelimitedDecode(f *testing.F) {
	f.Add([]byte("user,item,value,time"), []byte("listener-1,show-2,4.5,2026-01-01T00:00:00Z"), false, uint16(7))
	f.Add([]byte("item\tuser\tkind"), []byte("show-2\tlistener-1\terase_item"), true, uint16(3))
	f.Add([]byte(`"user",item,event_id`), []byte(`"a ""b""",c,"e,1"`), false, uint16(12))
	f.Fuzz(func(t *testing.T, header, rec []byte, tsv bool, split uint16) {
		sep := byte(',')
		if tsv {
			sep = '\t'
		}
		for _, o := range []DecodeOptions{{}, {Implicit: true}} {
			d, err := NewDelimitedDecoder(header, sep, o)
			if err != nil {
				var de *DecodeError
				if !errors.As(err, &de) {
					t.Fatalf("header error %v is not a *DecodeError", err)
				}
				continue
			}
			var b Batch
			if err := d.Decode(rec, &b); err != nil {
				checkFailure(t, err, &b)
			} else {
				checkRoundTrip(t, &b.Events[0], o)
			}
			at := int(split) % (len(rec) + 1)
			d1, _ := NewDelimitedDecoder(header, sep, o)
			d2, _ := NewDelimitedDecoder(header, sep, o)
			whole, rw := decodeLines(t, &chunkReader{parts: [][]byte{rec}}, d1)
			parts, rp := decodeLines(t, &chunkReader{parts: [][]byte{rec[:at:at], rec[at:]}}, d2)
			sameStreams(t, whole, parts, rw, rp)
		}
	})
}
