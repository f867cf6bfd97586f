// Package reader reads the factor vectors that freshet publishes to Redis and
// scores candidate lists with them, the way a ranking service calls it at
// request time. It depends only on go-redis and the standard library, so other
// modules can import it without pulling in freshet's model.
//
// # Key layout
//
// Every key starts with a namespace prefix P (no '{' or '}', so no hash tag
// pins keys to one Redis Cluster slot) and uses '/' as separator:
//
//	P/current              string: the current version, a decimal number
//	P/epoch                string: the writer's random token (data-loss marker)
//	P/v/V/meta             string: JSON metadata of version V (see Meta)
//	P/v/V/u/B              hash: user vectors of version V in bucket B
//	P/v/V/i/B              hash: item vectors of version V in bucket B
//
// A vector lives in bucket B = FNV-1a-64(id) mod Buckets (Buckets from the
// metadata), in a hash field named by the raw ID bytes. Every command in the
// read and write paths names a single key, so the layout works on a cluster.
//
// # Value encoding
//
// A vector value is little-endian binary: k float32 factors at offset 0, then
// (explicit mode only) the float32 bias at offset 4k, then a 20-byte row
// trailer used by restore: row index int32, update count uint32, time of the
// last update int64 (ms), latent epoch uint32. Readers need only the factors
// and the bias; the metadata's "encoding" object gives every offset.
//
// # Consistency
//
// A reader resolves P/current once and reads all keys of one request from that
// version in one pipeline that ends with EXISTS of the version's meta key. An
// old version is retired by deleting its meta key first and its buckets after,
// so when the meta key still exists at the end of the pipeline no bucket read
// earlier in it had been deleted yet: a result never mixes versions and never
// comes from a half-deleted one. When the meta key is gone the reader resolves
// the pointer again and retries.
package reader

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
)

// Layout builds freshet's Redis key names under one prefix.
type Layout struct {
	prefix string
}

// DefaultPrefix is the namespace prefix when none is configured.
const DefaultPrefix = "freshet"

// TrailerLen is the length in bytes of the row trailer after the floats.
const TrailerLen = 20

// NewLayout returns the layout under prefix ("" means DefaultPrefix). A
// prefix with '{' or '}' is refused: it would act as a cluster hash tag.
func NewLayout(prefix string) (Layout, error) {
	if prefix == "" {
		prefix = DefaultPrefix
	}
	if strings.ContainsAny(prefix, "{}") {
		return Layout{}, fmt.Errorf("reader: prefix %q: must not contain '{' or '}' (a cluster hash tag)", prefix)
	}
	return Layout{prefix: prefix}, nil
}

// Prefix returns the namespace prefix.
func (l Layout) Prefix() string { return l.prefix }

// Current is the key of the pointer to the current version.
func (l Layout) Current() string { return l.prefix + "/current" }

// Epoch is the key of the writer's data-loss marker.
func (l Layout) Epoch() string { return l.prefix + "/epoch" }

// Meta is the key of version v's metadata.
func (l Layout) Meta(v uint64) string { return l.prefix + "/v/" + strconv.FormatUint(v, 10) + "/meta" }

// Bucket is the key of the hash holding bucket b of side ("u" or "i") in v.
func (l Layout) Bucket(v uint64, side string, b int) string {
	return l.prefix + "/v/" + strconv.FormatUint(v, 10) + "/" + side + "/" + strconv.Itoa(b)
}

// Side names used in bucket keys.
const (
	SideUser = "u"
	SideItem = "i"
)

// BucketOf returns FNV-1a-64(id) mod n, the bucket of id among n.
//
// FNV-1a (Fowler, Noll, Vo): h = 14695981039346656037; for each byte c,
// h = (h XOR c) · 1099511628211 mod 2^64.
func BucketOf(id string, n int) int {
	h := uint64(14695981039346656037)
	for i := 0; i < len(id); i++ {
		h ^= uint64(id[i])
		h *= 1099511628211
	}
	return int(h % uint64(n))
}

// BucketOfBytes is BucketOf for a byte slice.
func BucketOfBytes(id []byte, n int) int {
	h := uint64(14695981039346656037)
	for _, c := range id {
		h ^= uint64(c)
		h *= 1099511628211
	}
	return int(h % uint64(n))
}

// Encoding describes the layout of a vector value.
type Encoding struct {
	Float     string `json:"float"`      // always "float32le"
	FactorsAt int    `json:"factors_at"` // byte offset of the k factors (0)
	BiasAt    int    `json:"bias_at"`    // byte offset of the bias, -1 when the mode has none
	TrailerAt int    `json:"trailer_at"` // byte offset of the 20-byte row trailer
	ValueLen  int    `json:"value_len"`  // total length of a value
}

// EncodingFor returns the value encoding for rank k, with or without a bias.
func EncodingFor(k int, bias bool) Encoding {
	e := Encoding{Float: "float32le", FactorsAt: 0, BiasAt: -1, TrailerAt: 4 * k}
	if bias {
		e.BiasAt = 4 * k
		e.TrailerAt = 4*k + 4
	}
	e.ValueLen = e.TrailerAt + TrailerLen
	return e
}

// Trailer is the row bookkeeping stored after the floats.
type Trailer struct {
	Row   int32
	Count uint32
	Last  int64
	Epoch uint32
}

// ErrBadValue is returned for a value whose length does not match the encoding.
var ErrBadValue = errors.New("reader: vector value has the wrong length")

// Encode appends the value for (vec, bias, t) to dst and returns it. bias is
// written only when e has a bias slot.
func (e Encoding) Encode(dst []byte, vec []float32, bias float32, t Trailer) []byte {
	for _, x := range vec {
		dst = binary.LittleEndian.AppendUint32(dst, math.Float32bits(x))
	}
	if e.BiasAt >= 0 {
		dst = binary.LittleEndian.AppendUint32(dst, math.Float32bits(bias))
	}
	dst = binary.LittleEndian.AppendUint32(dst, uint32(t.Row))
	dst = binary.LittleEndian.AppendUint32(dst, t.Count)
	dst = binary.LittleEndian.AppendUint64(dst, uint64(t.Last))
	dst = binary.LittleEndian.AppendUint32(dst, t.Epoch)
	return dst
}

// Decode reads value v into vec (len k) and returns the bias (0 without a bias
// slot) and the trailer. It reads the string in place: no copy, no allocation.
func (e Encoding) Decode(v string, vec []float32) (bias float32, t Trailer, err error) {
	if len(v) != e.ValueLen || 4*len(vec) != e.TrailerAt-4*b2i(e.BiasAt >= 0) {
		return 0, t, ErrBadValue
	}
	for j := range vec {
		vec[j] = math.Float32frombits(le32(v, 4*j))
	}
	if e.BiasAt >= 0 {
		bias = math.Float32frombits(le32(v, e.BiasAt))
	}
	o := e.TrailerAt
	t.Row = int32(le32(v, o))
	t.Count = le32(v, o+4)
	t.Last = int64(uint64(le32(v, o+8)) | uint64(le32(v, o+12))<<32)
	t.Epoch = le32(v, o+16)
	return bias, t, nil
}

func le32(s string, o int) uint32 {
	return uint32(s[o]) | uint32(s[o+1])<<8 | uint32(s[o+2])<<16 | uint32(s[o+3])<<24
}

func b2i(b bool) int {
	if b {
		return 1
	}
	return 0
}
