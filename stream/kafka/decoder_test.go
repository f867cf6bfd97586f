package kafka

import (
	"fmt"
	"iter"
	"strconv"

	"freshet.dev/freshet/stream"
)

// jsonDecoder is the decoder the daemon uses for Kafka records.
func jsonDecoder() stream.Decoder { return stream.NewJSONDecoder(stream.DecodeOptions{}) }

// rawDecoder adds a fixed event per record without parsing it: the
// benchmark's consume-only baseline.
type rawDecoder struct{}

var rawUser, rawItem = []byte("u"), []byte("i")

func (rawDecoder) Decode(rec []byte, b *stream.Batch) error {
	b.Add(stream.Event{User: rawUser, Item: rawItem, Value: float64(len(rec))})
	return nil
}

// bad reports whether test record i is one of the malformed 1%.
func bad(i int) bool { return i%100 == 37 }

// testRecords yields n records, keyed by user; record i is malformed when
// bad(i): odd hundreds are truncated JSON, even hundreds miss the user.
func testRecords(n int) iter.Seq[Record] {
	return func(yield func(Record) bool) {
		var buf []byte
		for i := range n {
			user := "listener-" + strconv.Itoa(i%997)
			buf = buf[:0]
			switch {
			case bad(i) && (i/100)%2 == 1:
				buf = fmt.Appendf(buf, `{"user":%q,"item":"show-%d","val`, user, i)
			case bad(i):
				buf = fmt.Appendf(buf, `{"user":"","item":"show-%d","value":1,"time":%d}`, i, i)
			default:
				buf = fmt.Appendf(buf, `{"user":%q,"item":"show-%d","value":%d.5,"time":%d}`, user, i, i%5, 1700000000000+int64(i))
			}
			if !yield(Record{Key: []byte(user), Value: buf}) {
				return
			}
		}
	}
}
