package stream

import (
	"errors"
	"testing"
)

func TestDelimitedHeaders(t *testing.T) {
	tests := []struct {
		name   string
		header string
		sep    byte
		opts   DecodeOptions
		rec    string
		want   Event
	}{
		{"csv canonical", "user,item,value,time,event_id,kind", ',', DecodeOptions{},
			"a,b,4.5,1767225600000,e1,", Event{User: []byte("a"), Item: []byte("b"), Value: 4.5, Time: 1767225600000, EventID: []byte("e1")}},
		{"csv reordered with spaces and case", " Time , VALUE,Item,user", ',', DecodeOptions{},
			" 2026-01-01T00:00:00Z , 3 ,b,a", Event{User: []byte("a"), Item: []byte("b"), Value: 3, Time: 1767225600000}},
		{"csv bom crlf and extra column", "\xef\xbb\xbfuser,comment,item,value\r", ',', DecodeOptions{},
			"a,whatever,b,2\r", Event{User: []byte("a"), Item: []byte("b"), Value: 2}},
		{"csv quoted header", `"user","item","value"`, ',', DecodeOptions{},
			`"a,1","b""x""",1`, Event{User: []byte("a,1"), Item: []byte(`b"x"`), Value: 1}},
		{"csv quoted empty", "user,item,value", ',', DecodeOptions{Implicit: true},
			`a,b,""`, Event{User: []byte("a"), Item: []byte("b"), Value: 1}},
		{"csv implicit without value column", "user,item", ',', DecodeOptions{Implicit: true},
			"a,b", Event{User: []byte("a"), Item: []byte("b"), Value: 1}},
		{"csv erase", "user,item,kind", ',', DecodeOptions{Implicit: true},
			"a,,erase_user", Event{User: []byte("a"), Kind: EraseUser}},
		{"tsv", "item\tuser\tvalue\ttime", '\t', DecodeOptions{},
			"show \"4\"\tlistener,1\t5\t1767225600000", Event{User: []byte("listener,1"), Item: []byte(`show "4"`), Value: 5, Time: 1767225600000}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			d, err := NewDelimitedDecoder([]byte(tt.header), tt.sep, tt.opts)
			if err != nil {
				t.Fatalf("NewDelimitedDecoder: %v", err)
			}
			got, err := decodeOne(t, d, tt.rec)
			if err != nil {
				t.Fatalf("Decode: %v", err)
			}
			if !eventsEqual(&got, &tt.want) {
				t.Fatalf("got %s, want %s", AppendJSON(nil, &got), AppendJSON(nil, &tt.want))
			}
		})
	}
}

func TestDelimitedHeaderErrors(t *testing.T) {
	tests := []struct {
		name, header string
		opts         DecodeOptions
		field        string
	}{
		{"no user", "item,value", DecodeOptions{}, "user"},
		{"no item", "user,value", DecodeOptions{}, "item"},
		{"no value explicit", "user,item", DecodeOptions{}, "value"},
		{"twice", "user,item,value,User", DecodeOptions{}, "user"},
		{"bad quoting", `"user,item,value`, DecodeOptions{}, ""},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := NewDelimitedDecoder([]byte(tt.header), ',', tt.opts)
			var de *DecodeError
			if !errors.As(err, &de) || de.Field != tt.field || de.Where != "header" {
				t.Fatalf("got %v, want a header error naming %q", err, tt.field)
			}
		})
	}
}

func TestDelimitedDecodeErrors(t *testing.T) {
	tests := []struct {
		name, rec     string
		opts          DecodeOptions
		field, reason string
	}{
		{"too few fields", "a,b", DecodeOptions{}, "", "2 fields, header has 4"},
		{"too many fields", "a,b,1,2,3", DecodeOptions{}, "", "5 fields"},
		{"unterminated quote", `"a,b,1,2`, DecodeOptions{}, "", "unterminated"},
		{"text after quote", `"a"x,b,1,2`, DecodeOptions{}, "", "after closing quote"},
		{"empty user", ",b,1,2", DecodeOptions{}, "user", "empty"},
		{"empty item", "a,,1,2", DecodeOptions{}, "item", "empty"},
		{"missing value", "a,b,,2", DecodeOptions{}, "value", "missing"},
		{"value text", "a,b,four,2", DecodeOptions{}, "value", "not a number"},
		{"value nan", "a,b,NaN,2", DecodeOptions{}, "value", "not a number"},
		{"value inf", "a,b,1e400,2", DecodeOptions{}, "value", "not finite"},
		{"value scale", "a,b,6,2", DecodeOptions{MinValue: 1, MaxValue: 5}, "value", "out of scale"},
		{"implicit nonpositive", "a,b,0,2", DecodeOptions{Implicit: true}, "value", "greater than 0"},
		{"bad time", "a,b,1,soon", DecodeOptions{}, "time", "epoch milliseconds"},
		{"bad rfc3339", "a,b,1,2026-02-30T00:00:00Z", DecodeOptions{}, "time", "day"},
		{"missing time", "a,b,1,", DecodeOptions{RequireTime: true}, "time", "missing"},
		{"long user", string(make([]byte, 0)) + longID() + ",b,1,2", DecodeOptions{}, "user", "longer"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			d, err := NewDelimitedDecoder([]byte("user,item,value,time"), ',', tt.opts)
			if err != nil {
				t.Fatal(err)
			}
			_, err = decodeOne(t, d, tt.rec)
			checkDecodeError(t, err, tt.field, tt.reason)
		})
	}
	d, _ := NewDelimitedDecoder([]byte("user,item,kind"), ',', DecodeOptions{Implicit: true})
	_, err := decodeOne(t, d, "a,b,purge")
	checkDecodeError(t, err, "kind", "unknown kind")
}

func longID() string {
	b := make([]byte, MaxIDLen+1)
	for i := range b {
		b[i] = 'z'
	}
	return string(b)
}

func TestDelimitedDecodeDoesNotAllocate(t *testing.T) {
	d, err := NewDelimitedDecoder([]byte("user,item,value,time,event_id"), ',', DecodeOptions{})
	if err != nil {
		t.Fatal(err)
	}
	plain := []byte("listener-000017,show-0004,4.5,1767225600000,e1")
	quoted := []byte(`"listener,""17""",show-0004,4.5,2026-01-01T00:00:00Z,e1`)
	var b Batch
	for range 1024 {
		b.Add(Event{User: make([]byte, 64)})
	}
	n := testing.AllocsPerRun(200, func() {
		b.Reset()
		if err := d.Decode(plain, &b); err != nil {
			t.Fatal(err)
		}
		if err := d.Decode(quoted, &b); err != nil {
			t.Fatal(err)
		}
	})
	if n != 0 {
		t.Fatalf("Decode allocates %.1f times per record pair, want 0", n)
	}
}

func BenchmarkCSVDecode(b *testing.B) {
	d, err := NewDelimitedDecoder([]byte("user,item,value,time,event_id"), ',', DecodeOptions{MinValue: 0.5, MaxValue: 5})
	if err != nil {
		b.Fatal(err)
	}
	rec := []byte("listener-000017,show-0004,4.5,1767225600000,e1")
	var batch Batch
	b.SetBytes(int64(len(rec)))
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		if i%256 == 0 {
			batch.Reset()
		}
		if err := d.Decode(rec, &batch); err != nil {
			b.Fatal(err)
		}
	}
}
