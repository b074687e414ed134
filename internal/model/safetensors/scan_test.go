package safetensors

import (
	"bytes"
	"encoding/binary"
	"errors"
	"maps"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"github.com/google/go-cmp/cmp"
	"github.com/x448/float16"
)

// scanChunks feeds data to a new Scanner in pieces of the given sizes
// (cycled; 0 means all at once) and returns its result.
func scanChunks(data []byte, size int64, pieces ...int) (*File, map[string]int64, error) {
	s := NewScanner(size)
	if len(pieces) == 0 || pieces[0] == 0 {
		s.Write(data)
		return s.Result()
	}
	for i := 0; len(data) > 0; i++ {
		k := min(pieces[i%len(pieces)], len(data))
		if n, err := s.Write(data[:k]); n != k || err != nil {
			panic("Scanner.Write must consume everything")
		}
		data = data[k:]
	}
	return s.Result()
}

var chunkings = [][]int{{0}, {1}, {3}, {7, 1, 2}, {4096}, {13, 8, 5}}

// TestScannerRefusesWhatParseRefuses: every malformed file of
// TestParseRefuses gets the same message from the Scanner, however it is
// chunked.
func TestScannerRefusesWhatParseRefuses(t *testing.T) {
	for _, c := range parseRefuseCases() {
		for _, ch := range chunkings {
			_, _, err := scanChunks(c.data, int64(len(c.data)), ch...)
			if err == nil || !errors.Is(err, ErrInvalid) || !strings.Contains(err.Error(), c.want) {
				t.Errorf("%s, chunks %v: got %v, want an ErrInvalid containing %q", c.name, ch, err, c.want)
			}
		}
	}
}

// TestScannerHeaderMatchesParse: on valid files the Scanner's header is
// Parse's, and a byte count other than the announced size is refused.
func TestScannerHeaderMatchesParse(t *testing.T) {
	files := [][]byte{
		build(refHeader, refData),
		build(`{"__metadata__":{"framework":"pt"}}     `, nil),
		build(`{"a":{"dtype":"BF16","shape":[2],"data_offsets":[0,4]},"z":{"dtype":"F16","shape":[0,2],"data_offsets":[4,4]},"m":{"dtype":"F32","shape":[],"data_offsets":[4,8]}}`,
			[]byte{0x80, 0x3F, 0x00, 0x40, 0, 0, 0x80, 0x3f}),
	}
	for i, data := range files {
		want := parseBytes(t, data)
		for _, ch := range chunkings {
			got, bad, err := scanChunks(data, int64(len(data)), ch...)
			if err != nil {
				t.Fatalf("file %d, chunks %v: %v", i, ch, err)
			}
			if d := cmp.Diff(want.Tensors, got.Tensors); d != "" || got.HeaderSize != want.HeaderSize || !maps.Equal(got.Metadata, want.Metadata) {
				t.Errorf("file %d, chunks %v: header differs from Parse's (-parse +scan):\n%s", i, ch, d)
			}
			if len(bad) != 0 {
				t.Errorf("file %d: non-finite values reported in finite data: %v", i, bad)
			}
		}
		if _, _, err := scanChunks(data[:len(data)-1], int64(len(data)), 0); err == nil || !strings.Contains(err.Error(), "announced") {
			t.Errorf("file %d cut one byte short of its announced size: got %v", i, err)
		}
		longer := append(slices.Clone(data), 0)
		if _, _, err := scanChunks(longer, int64(len(data)), 5); err == nil || !strings.Contains(err.Error(), "announced") {
			t.Errorf("file %d with a byte more than announced: got %v", i, err)
		}
	}
}

// nonFiniteRef is the reference for FirstNonFinite: decode each element
// (F32 through math.Float32frombits, F16 through the x448/float16 library,
// BF16 as the upper half of a binary32) and ask math.IsNaN / math.IsInf.
func nonFiniteRef(dtype string, raw []byte) (int, bool) {
	es, _ := DTypeSize(dtype)
	for i := 0; i+es <= len(raw); i += es {
		var v float64
		switch dtype {
		case F32:
			v = float64(math.Float32frombits(binary.LittleEndian.Uint32(raw[i:])))
		case F16:
			v = float64(float16.Frombits(binary.LittleEndian.Uint16(raw[i:])).Float32())
		case BF16:
			v = float64(math.Float32frombits(uint32(binary.LittleEndian.Uint16(raw[i:])) << 16))
		}
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return i / es, true
		}
	}
	return 0, false
}

// TestFirstNonFiniteBitPatterns puts each edge pattern (IEEE 754-2019
// §3.4: exponent all ones is NaN or infinity; the largest finite values
// and subnormals are not) at every position of a short buffer.
func TestFirstNonFiniteBitPatterns(t *testing.T) {
	patterns := map[string][]uint32{
		F32:  {0x7f800000, 0xff800000, 0x7fc00000, 0xffc00001, 0x7f800001, 0x7f7fffff, 0xff7fffff, 0x00000001, 0x80000000, 0x3f800000, 0x7f000000, 0x00800000},
		F16:  {0x7c00, 0xfc00, 0x7e00, 0xfc01, 0x7bff, 0xfbff, 0x0001, 0x8000, 0x3c00, 0x7800, 0x0400},
		BF16: {0x7f80, 0xff80, 0x7fc0, 0xff81, 0x7f7f, 0xff7f, 0x0001, 0x8000, 0x3f80, 0x7f00, 0x0080},
	}
	for dtype, pats := range patterns {
		es, _ := DTypeSize(dtype)
		const n = 41
		for _, p := range pats {
			for pos := range n {
				raw := make([]byte, n*es)
				for i := range n { // a finite background: 1.0
					put(dtype, raw[i*es:], map[string]uint32{F32: 0x3f800000, F16: 0x3c00, BF16: 0x3f80}[dtype])
				}
				put(dtype, raw[pos*es:], p)
				wi, wbad := nonFiniteRef(dtype, raw)
				gi, gbad := FirstNonFinite(dtype, raw)
				if gi != wi || gbad != wbad {
					t.Errorf("%s pattern %#x at %d: got (%d, %v), want (%d, %v)", dtype, p, pos, gi, gbad, wi, wbad)
				}
			}
		}
	}
}

func put(dtype string, b []byte, v uint32) {
	if dtype == F32 {
		binary.LittleEndian.PutUint32(b, v)
	} else {
		binary.LittleEndian.PutUint16(b, uint16(v))
	}
}

// TestScannerFindsNonFinite: random F32, F16 and BF16 tensors with NaN or
// infinity planted at random places; the Scanner, fed in odd chunk sizes
// that split elements, reports each tensor's first one as the reference
// does on the whole tensor.
func TestScannerFindsNonFinite(t *testing.T) {
	r := rand.New(rand.NewPCG(7, 11))
	for round := range 60 {
		var tensors []Tensor
		for k := range 1 + r.IntN(4) {
			n := r.IntN(300)
			vals := make([]float32, n)
			for i := range vals {
				vals[i] = float32(r.Float64()*2 - 1)
			}
			for range r.IntN(3) {
				if n > 0 {
					vals[r.IntN(n)] = []float32{float32(math.NaN()), float32(math.Inf(1)), float32(math.Inf(-1))}[r.IntN(3)]
				}
			}
			tensors = append(tensors, Tensor{Name: string(rune('a' + k)), DType: []string{F32, F16, BF16}[r.IntN(3)], Shape: []int{n}, Data: vals})
		}
		data, err := Encode(tensors, nil)
		if err != nil {
			t.Fatal(err)
		}
		f := parseBytes(t, data)
		want := map[string]int64{}
		for _, ti := range f.Tensors {
			raw, err := f.Raw(ti.Name)
			if err != nil {
				t.Fatal(err)
			}
			if i, bad := nonFiniteRef(ti.DType, raw); bad {
				want[ti.Name] = int64(i)
			}
		}
		for _, ch := range append(chunkings, []int{1 + r.IntN(9), 1 + r.IntN(9)}) {
			_, got, err := scanChunks(data, int64(len(data)), ch...)
			if err != nil {
				t.Fatalf("round %d: %v", round, err)
			}
			if d := cmp.Diff(want, got); d != "" {
				t.Errorf("round %d, chunks %v: first non-finite per tensor (-want +got):\n%s", round, ch, d)
			}
		}
	}
}

// FuzzScanner: for any bytes and any chunking, the Scanner agrees with
// Parse on validity and header, and with the element-by-element reference
// on each tensor's first non-finite value.
func FuzzScanner(f *testing.F) {
	f.Add(build(refHeader, refData), uint8(3))
	f.Add(build(`{"a":{"dtype":"BF16","shape":[2],"data_offsets":[0,4]},"b":{"dtype":"F16","shape":[3],"data_offsets":[4,10]}}`,
		[]byte{0x80, 0x3F, 0xC0, 0x7F, 0, 0x7c, 1, 2, 3, 4}), uint8(1))
	f.Add(build(`{"a":{"dtype":"F32","shape":[3],"data_offsets":[0,12]}}`, f32le(1, float32(math.Inf(-1)), 2)), uint8(5))
	f.Add(append(le64(1<<62), '{', '}'), uint8(0))
	f.Fuzz(func(t *testing.T, data []byte, piece uint8) {
		want, perr := Parse(bytes.NewReader(data), int64(len(data)))
		got, bad, serr := scanChunks(data, int64(len(data)), int(piece))
		if (perr == nil) != (serr == nil) {
			t.Fatalf("Parse error %v, Scanner error %v", perr, serr)
		}
		if perr != nil {
			if perr.Error() != serr.Error() {
				t.Fatalf("messages differ:\nParse:   %v\nScanner: %v", perr, serr)
			}
			return
		}
		if d := cmp.Diff(want.Tensors, got.Tensors); d != "" {
			t.Fatalf("tensors differ (-parse +scan):\n%s", d)
		}
		for _, ti := range want.Tensors {
			raw, err := want.Raw(ti.Name)
			if err != nil {
				t.Fatal(err)
			}
			wi, wbad := nonFiniteRef(ti.DType, raw)
			gi, gbad := bad[ti.Name]
			if wbad != gbad || (wbad && int64(wi) != gi) {
				t.Fatalf("tensor %q: reference (%d, %v), scanner (%d, %v)", ti.Name, wi, wbad, gi, gbad)
			}
		}
	})
}

// TestFirstNonFiniteEvery16BitPattern: for every F16 and BF16 bit pattern,
// in both 32-byte steps and in the scalar tail, the word scan
// agrees with decoding (F16 by the x448/float16 library, BF16 as the upper
// half of a binary32) and math.IsNaN / math.IsInf.
func TestFirstNonFiniteEvery16BitPattern(t *testing.T) {
	for _, dtype := range []string{F16, BF16} {
		for bits := 0; bits < 1<<16; bits++ {
			var v float64
			if dtype == F16 {
				v = float64(float16.Frombits(uint16(bits)).Float32())
			} else {
				v = float64(math.Float32frombits(uint32(bits) << 16))
			}
			want := math.IsNaN(v) || math.IsInf(v, 0)
			for _, pos := range []int{0, 15, 17, 35} { // first 32-byte step, its end, the second step, the tail
				raw := make([]byte, 72)
				binary.LittleEndian.PutUint16(raw[2*pos:], uint16(bits))
				i, bad := FirstNonFinite(dtype, raw)
				if bad != want || (bad && i != pos) {
					t.Fatalf("%s %#04x at %d: scan (%d, %v), decoded value %v", dtype, bits, pos, i, bad, v)
				}
			}
		}
	}
}

// TestDecodeShared: the same values as Decode (F32 through
// math.Float32frombits, F16/BF16 as Decode gives them); an aligned F32
// buffer is viewed, not copied; a misaligned one is copied.
func TestDecodeShared(t *testing.T) {
	vals := []float32{1, -2.5, float32(math.Inf(1)), 3e-40, 0}
	buf := make([]byte, 4+4*len(vals)) // a large-enough allocation is 8-aligned
	copy(buf[4:], f32le(vals...))
	aligned := buf[4:]
	got := DecodeShared(F32, aligned)
	for i, v := range vals {
		if math.Float32bits(got[i]) != math.Float32bits(v) {
			t.Errorf("[%d] = %v, want %v", i, got[i], v)
		}
	}
	aligned[0] ^= 1 // a view sees the change
	if math.Float32bits(got[0]) == math.Float32bits(vals[0]) {
		t.Error("aligned F32: the result is a copy, not a view")
	}
	mis := make([]byte, 1+4*len(vals))
	copy(mis[1:], f32le(vals...))
	got = DecodeShared(F32, mis[1:])
	mis[1] ^= 1
	if math.Float32bits(got[0]) != math.Float32bits(vals[0]) {
		t.Error("misaligned F32: the result changed with the buffer (not a copy)")
	}
	for _, dt := range []string{F16, BF16} {
		raw := []byte{0x00, 0x3c, 0x00, 0xc0, 0x80, 0x3f, 0x00, 0x00}
		a, b := DecodeShared(dt, raw), Decode(dt, raw)
		if !slices.Equal(a, b) {
			t.Errorf("%s: shared %v, copy %v", dt, a, b)
		}
	}
}
