package reader

import (
	"hash/fnv"
	"math"
	"math/rand/v2"
	"testing"
)

// TestBucketOfMatchesFNV checks the inline FNV-1a against the standard
// library's hash/fnv (a reference implementation).
func TestBucketOfMatchesFNV(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	for range 1000 {
		b := make([]byte, rng.IntN(40))
		for i := range b {
			b[i] = byte(rng.Uint32())
		}
		h := fnv.New64a()
		h.Write(b)
		for _, n := range []int{1, 7, 1024} {
			want := int(h.Sum64() % uint64(n))
			if got := BucketOf(string(b), n); got != want {
				t.Fatalf("BucketOf(%x, %d) = %d, want %d", b, n, got, want)
			}
			if got := BucketOfBytes(b, n); got != want {
				t.Fatalf("BucketOfBytes(%x, %d) = %d, want %d", b, n, got, want)
			}
		}
	}
}

func TestEncodeDecode(t *testing.T) {
	for _, bias := range []bool{false, true} {
		e := EncodingFor(5, bias)
		vec := []float32{1, -2.5, float32(math.Copysign(0, -1)), math.MaxFloat32, math.SmallestNonzeroFloat32}
		tr := Trailer{Row: 123456, Count: 4e9, Last: -1234567890123, Epoch: 9}
		v := e.Encode(nil, vec, 0.75, tr)
		if len(v) != e.ValueLen {
			t.Fatalf("len %d, want %d", len(v), e.ValueLen)
		}
		// Little-endian float32: 1.0 is 0x3f800000, stored 00 00 80 3f.
		if v[0] != 0 || v[1] != 0 || v[2] != 0x80 || v[3] != 0x3f {
			t.Fatalf("first float bytes % x, want 00 00 80 3f", v[:4])
		}
		got := make([]float32, 5)
		b, gt, err := e.Decode(string(v), got)
		if err != nil {
			t.Fatal(err)
		}
		for i := range vec {
			if math.Float32bits(got[i]) != math.Float32bits(vec[i]) {
				t.Fatalf("factor %d: %v, want %v", i, got[i], vec[i])
			}
		}
		wantB := float32(0)
		if bias {
			wantB = 0.75
		}
		if b != wantB || gt != tr {
			t.Fatalf("bias %v trailer %+v, want %v %+v", b, gt, wantB, tr)
		}
		if _, _, err := e.Decode(string(v[:len(v)-1]), got); err == nil {
			t.Fatal("short value accepted")
		}
		if _, _, err := e.Decode(string(v), got[:4]); err == nil {
			t.Fatal("wrong rank accepted")
		}
	}
	e := EncodingFor(64, true)
	s := string(e.Encode(nil, make([]float32, 64), 1, Trailer{}))
	dst := make([]float32, 64)
	if a := testing.AllocsPerRun(100, func() { _, _, _ = e.Decode(s, dst) }); a != 0 {
		t.Fatalf("Decode allocates %v times", a)
	}
}

func TestLayout(t *testing.T) {
	if _, err := NewLayout("a{b}"); err == nil {
		t.Fatal("hash-tag prefix accepted")
	}
	l, _ := NewLayout("")
	cases := map[string]string{
		l.Current():                  "freshet/current",
		l.Epoch():                    "freshet/epoch",
		l.Meta(12):                   "freshet/v/12/meta",
		l.Bucket(12, SideItem, 1023): "freshet/v/12/i/1023",
	}
	for got, want := range cases {
		if got != want {
			t.Errorf("key %q, want %q", got, want)
		}
	}
	if _, err := ParsePointer("x"); err == nil {
		t.Error("bad pointer accepted")
	}
	if v, err := ParsePointer("42"); err != nil || v != 42 {
		t.Errorf("ParsePointer(42) = %d, %v", v, err)
	}
}
