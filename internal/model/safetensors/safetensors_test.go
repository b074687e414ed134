package safetensors

import (
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"maps"
	"math"
	"math/rand"
	"runtime"
	"slices"
	"strings"
	"testing"

	"github.com/google/go-cmp/cmp"
	"github.com/x448/float16"

	"github.com/modelgate/modelgate/internal/errkind"
)

// le64 is the 8-byte little-endian length field.
func le64(n uint64) []byte {
	var b [8]byte
	binary.LittleEndian.PutUint64(b[:], n)
	return b[:]
}

// build assembles a file by hand: length field, header text, byte buffer.
func build(header string, buf []byte) []byte {
	out := append(le64(uint64(len(header))), header...)
	return append(out, buf...)
}

// f32le is the little-endian bytes of float32 values, via math.Float32bits.
func f32le(vals ...float32) []byte {
	out := make([]byte, 0, 4*len(vals))
	for _, v := range vals {
		out = binary.LittleEndian.AppendUint32(out, math.Float32bits(v))
	}
	return out
}

func parseBytes(t *testing.T, data []byte) *File {
	t.Helper()
	f, err := Parse(bytes.NewReader(data), int64(len(data)))
	if err != nil {
		t.Fatalf("Parse: %v", err)
	}
	return f
}

func sha(b []byte) string {
	s := sha256.Sum256(b)
	return hex.EncodeToString(s[:])
}

// The hand-built vector of REFERENCES.md (safetensors section): tensor w,
// F32, shape [2,3], values 1..6. The layout (u64 LE length, JSON header,
// byte buffer, data_offsets relative to the buffer, little-endian C order)
// is the format's README, huggingface/safetensors README.md "Format".
const refHeader = `{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[0,24]}}`

// refData is 1.0 … 6.0 as IEEE 754 binary32, little-endian, written out by
// hand (1.0 = 0x3F800000, 2.0 = 0x40000000, 3.0 = 0x40400000,
// 4.0 = 0x40800000, 5.0 = 0x40A00000, 6.0 = 0x40C00000).
var refData = []byte{
	0x00, 0x00, 0x80, 0x3F,
	0x00, 0x00, 0x00, 0x40,
	0x00, 0x00, 0x40, 0x40,
	0x00, 0x00, 0x80, 0x40,
	0x00, 0x00, 0xA0, 0x40,
	0x00, 0x00, 0xC0, 0x40,
}

func TestReferenceVector(t *testing.T) {
	if len(refHeader) != 57 {
		t.Fatalf("reference header is %d bytes, REFERENCES.md says 57", len(refHeader))
	}
	unpadded := build(refHeader, refData)
	padded := build(refHeader+strings.Repeat(" ", 64-57), refData)

	for _, tc := range []struct {
		name       string
		data       []byte
		size       int
		sum        string // REFERENCES.md, safetensors hand-built vector
		headerSize int64
	}{
		{"unpadded", unpadded, 89, "6143e032d8fb30c65304fb13a18a98de451e82f2a49ff2936e143629d5c67a4b", 57},
		{"padded", padded, 96, "ce3fe6742cd83277e3941206c742fe23d2bca7b23eb022769ad09d03c6a07808", 64},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if len(tc.data) != tc.size {
				t.Fatalf("file is %d bytes, want %d", len(tc.data), tc.size)
			}
			if got := sha(tc.data); got != tc.sum {
				t.Fatalf("sha256 = %s, want %s", got, tc.sum)
			}
			f := parseBytes(t, tc.data)
			if f.HeaderSize != tc.headerSize {
				t.Errorf("HeaderSize = %d, want %d", f.HeaderSize, tc.headerSize)
			}
			want := []TensorInfo{{Name: "w", DType: "F32", Shape: []int{2, 3}, Begin: 0, End: 24}}
			if d := cmp.Diff(want, f.Tensors); d != "" {
				t.Errorf("Tensors (-want +got):\n%s", d)
			}
			if f.Metadata != nil {
				t.Errorf("Metadata = %v, want nil", f.Metadata)
			}
			raw, err := f.Raw("w")
			if err != nil || !bytes.Equal(raw, refData) {
				t.Errorf("Raw = %x, %v; want %x", raw, err, refData)
			}
			vals, err := f.Float32s("w")
			if err != nil {
				t.Fatal(err)
			}
			if d := cmp.Diff([]float32{1, 2, 3, 4, 5, 6}, vals); d != "" {
				t.Errorf("Float32s (-want +got):\n%s", d)
			}
		})
	}

	// Our writer pads the 57-byte header to 64 bytes (8+57 = 65 rounds up to
	// 72, a multiple of 8), so it must produce exactly the padded vector.
	got, err := Encode([]Tensor{{Name: "w", DType: "F32", Shape: []int{2, 3}, Data: []float32{1, 2, 3, 4, 5, 6}}}, nil)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got, padded) {
		t.Errorf("Encode =\n%q\nwant the padded reference vector\n%q", got, padded)
	}
	if s := sha(got); s != "ce3fe6742cd83277e3941206c742fe23d2bca7b23eb022769ad09d03c6a07808" {
		t.Errorf("sha256(Encode) = %s", s)
	}
}

// The format's reference implementation (huggingface/safetensors,
// safetensors/src/tensor.rs, tests test_serialization,
// test_serialization_forced_alignement and test_empty) pins the exact bytes
// it writes for these inputs. Each has a single tensor (or none), so its
// tensor ordering rule (by dtype alignment, then name) and ours (by name)
// agree, and our output must be byte-identical.
func TestMatchesReferenceImplementationOutput(t *testing.T) {
	zeroToFive := []float32{0, 1, 2, 3, 4, 5}
	for _, tc := range []struct {
		name    string
		tensors []Tensor
		meta    map[string]string
		header  string // what the reference writes, padding included
		buf     []byte
	}{
		{
			name:    "test_serialization",
			tensors: []Tensor{{Name: "attn.0", DType: "F32", Shape: []int{1, 2, 3}, Data: zeroToFive}},
			header:  `{"attn.0":{"dtype":"F32","shape":[1,2,3],"data_offsets":[0,24]}}`, // 64 bytes, no padding
			buf:     f32le(zeroToFive...),
		},
		{
			name:    "test_serialization_forced_alignement",
			tensors: []Tensor{{Name: "attn0", DType: "F32", Shape: []int{1, 1, 2, 3}, Data: zeroToFive}},
			header:  `{"attn0":{"dtype":"F32","shape":[1,1,2,3],"data_offsets":[0,24]}}` + "       ", // 65 + 7
			buf:     f32le(zeroToFive...),
		},
		{
			name:   "test_empty",
			header: `{}` + "      ",
		},
		{
			name:   "test_empty with metadata",
			meta:   map[string]string{"framework": "pt"},
			header: `{"__metadata__":{"framework":"pt"}}` + "     ",
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			want := build(tc.header, tc.buf)
			if len(tc.header)%8 != 0 {
				t.Fatalf("test header is %d bytes, not a multiple of 8", len(tc.header))
			}
			got, err := Encode(tc.tensors, tc.meta)
			if err != nil {
				t.Fatal(err)
			}
			if !bytes.Equal(got, want) {
				t.Errorf("Encode =\n%q\nwant\n%q", got, want)
			}
			f := parseBytes(t, got)
			if len(f.Tensors) != len(tc.tensors) || !maps.Equal(f.Metadata, tc.meta) {
				t.Errorf("Parse gave %d tensors, metadata %v", len(f.Tensors), f.Metadata)
			}
		})
	}
}

// refuseCase is a file Parse must refuse and a part of its message.
type refuseCase struct {
	name string
	data []byte
	want string
}

func parseRefuseCases() []refuseCase {
	const okEntry = `"w":{"dtype":"F32","shape":[2,3],"data_offsets":[0,24]}`
	six := make([]byte, 24)
	return []refuseCase{
		{"file shorter than 8 bytes", []byte{1, 0, 0, 0, 0}, "5 bytes, shorter than the 8-byte header length"},
		{"empty file", nil, "0 bytes, shorter than"},
		{"header length 0", le64(0), "header length is 0"},
		{"header length above limit", append(le64(MaxHeaderSize+1), "{}"...), "header length 16777217 exceeds the limit of 16777216 bytes"},
		{"header length 2^63", append(le64(1<<63), "{}"...), "exceeds the limit"},
		{"header length above file", append(le64(100), `{}`...), "header length 100 exceeds the 2 bytes that follow"},
		{"header not UTF-8", build("{\"w\xff\":{}}", nil), "header is not valid UTF-8"},
		{"header is an array", build(`[1,2]`, nil), "header does not start with '{' (found byte 0x5b)"},
		{"header with leading space", build(` {}`, nil), "does not start with '{'"},
		{"header all spaces", build(`        `, nil), "does not start with '{'"},
		{"header not JSON", build(`{"w":}`, nil), "header is not valid JSON"},
		{"header truncated", build(`{"w":{"dtype":"F32"`, nil), "header is not valid JSON: unexpected end"},
		{"header object unterminated", build(`{"w":{"dtype":"F32","shape":[],"data_offsets":[0,4]}`, make([]byte, 4)), "header is not valid JSON"},
		{"text after the object", build(`{}x`, nil), "header byte 2 (0x78) follows the JSON object; only spaces may pad the header"},
		{"newline padding", build("{}\n", nil), "header byte 2 (0x0a) follows the JSON object"},
		{"NUL padding", build("{}\x00\x00", nil), "header byte 2 (0x00) follows the JSON object"},
		{"second object", build(`{}{}`, nil), "header byte 2 (0x7b) follows"},
		{"metadata a string", build(`{"__metadata__":"x"}`, nil), `__metadata__ is not an object (found a string)`},
		{"metadata null", build(`{"__metadata__":null}`, nil), `__metadata__ is not an object (found null)`},
		{"metadata number value", build(`{"__metadata__":{"a":1}}`, nil), `__metadata__: value of "a" is the number 1, not a string`},
		{"metadata nested object", build(`{"__metadata__":{"a":{}}}`, nil), `__metadata__: value of "a" is an object, not a string`},
		{"metadata duplicate key", build(`{"__metadata__":{"a":"1","a":"2"}}`, nil), `__metadata__: duplicate key "a"`},
		{"metadata twice", build(`{"__metadata__":{},"__metadata__":{}}`, nil), "duplicate __metadata__ key"},
		{"duplicate tensor name", build(`{`+okEntry+`,`+okEntry+`}`, six), `duplicate tensor name "w"`},
		{"tensor entry not an object", build(`{"w":[1]}`, nil), `tensor "w" is not an object (found an array)`},
		{"unknown dtype", build(`{"w":{"dtype":"Q4","shape":[],"data_offsets":[0,0]}}`, nil), `tensor "w": dtype "Q4" is not supported (supported: F32, F16, BF16)`},
		{"unsupported dtype F64", build(`{"w":{"dtype":"F64","shape":[3],"data_offsets":[0,24]}}`, six), `dtype "F64" is not supported`},
		{"dtype not a string", build(`{"w":{"dtype":4,"shape":[],"data_offsets":[0,4]}}`, make([]byte, 4)), `tensor "w": dtype is the number 4, not a string`},
		{"negative dim", build(`{"w":{"dtype":"F32","shape":[-2,3],"data_offsets":[0,24]}}`, six), `tensor "w": shape[0] = -2 is negative`},
		{"fractional dim", build(`{"w":{"dtype":"F32","shape":[2,3.5],"data_offsets":[0,24]}}`, six), `tensor "w": shape[1] = 3.5 is not an integer`},
		{"dim written as 2.0", build(`{"w":{"dtype":"F32","shape":[2.0,3],"data_offsets":[0,24]}}`, six), `shape[0] = 2.0 is not an integer`},
		{"dim with exponent", build(`{"w":{"dtype":"F32","shape":[6e0],"data_offsets":[0,24]}}`, six), `shape[0] = 6e0 is not an integer`},
		{"dim a string", build(`{"w":{"dtype":"F32","shape":["6"],"data_offsets":[0,24]}}`, six), `shape[0] is a string, not an integer`},
		{"dim nested array", build(`{"w":{"dtype":"F32","shape":[[6]],"data_offsets":[0,24]}}`, six), `shape[0] is an array, not an integer`},
		{"shape not an array", build(`{"w":{"dtype":"F32","shape":6,"data_offsets":[0,24]}}`, six), `tensor "w": shape is the number 6, not an array of integers`},
		{"dim beyond int64", build(`{"w":{"dtype":"F32","shape":[99999999999999999999],"data_offsets":[0,24]}}`, six), `shape[0] = 99999999999999999999 is out of range`},
		{"element count overflow", build(`{"w":{"dtype":"F32","shape":[4294967296,4294967296],"data_offsets":[0,24]}}`, six), `tensor "w": shape [4294967296 4294967296]: element count overflows int64`},
		{"overflow before a zero dim", build(`{"w":{"dtype":"F32","shape":[4294967296,4294967296,0],"data_offsets":[0,0]}}`, nil), `element count overflows int64`},
		{"byte count overflow", build(`{"w":{"dtype":"F32","shape":[4611686018427387904],"data_offsets":[0,24]}}`, six), `byte count of F32 overflows int64`},
		{"data_offsets one value", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[24]}}`, six), `tensor "w": data_offsets has 1 values, want 2`},
		{"data_offsets three values", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[0,24,24]}}`, six), `data_offsets has 3 values, want 2`},
		{"data_offsets strings", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":["0","24"]}}`, six), `data_offsets[0] is a string, not an integer`},
		{"data_offsets not array", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":{}}}`, six), `data_offsets is an object, not an array of integers`},
		{"data_offsets negative", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[-1,23]}}`, six), `data_offsets[0] = -1 is negative`},
		{"data_offsets fractional", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[0,24.0]}}`, six), `data_offsets[1] = 24.0 is not an integer`},
		{"begin after end", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[24,0]}}`, six), `tensor "w": data_offsets begin 24 is after end 0`},
		{"end beyond buffer", build(`{"w":{"dtype":"F32","shape":[7],"data_offsets":[0,28]}}`, six), `tensor "w": data_offsets end 28 is beyond the byte buffer of 24 bytes`},
		{"end far beyond buffer", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[9223372036854775783,9223372036854775807]}}`, six), `end 9223372036854775807 is beyond the byte buffer`},
		{"length does not match shape", build(`{"w":{"dtype":"F32","shape":[2,3],"data_offsets":[0,20]}}`, six[:20]), `tensor "w": data_offsets span 20 bytes, but shape [2 3] of F32 needs 24`},
		{"BF16 length with F32 bytes", build(`{"w":{"dtype":"BF16","shape":[2,3],"data_offsets":[0,24]}}`, six), `span 24 bytes, but shape [2 3] of BF16 needs 12`},
		{"overlap", build(`{"a":{"dtype":"F32","shape":[6],"data_offsets":[0,24]},"b":{"dtype":"F32","shape":[6],"data_offsets":[16,40]}}`, make([]byte, 40)),
			`tensors "a" [0, 24) and "b" [16, 40) overlap`},
		{"same bytes twice", build(`{"a":{"dtype":"F32","shape":[6],"data_offsets":[0,24]},"b":{"dtype":"F32","shape":[6],"data_offsets":[0,24]}}`, six),
			`tensors "a" [0, 24) and "b" [0, 24) overlap`},
		{"empty tensor inside another", build(`{"a":{"dtype":"F32","shape":[6],"data_offsets":[0,24]},"z":{"dtype":"F32","shape":[0],"data_offsets":[12,12]}}`, six),
			`tensors "a" [0, 24) and "z" [12, 12) overlap`},
		{"gap between tensors", build(`{"a":{"dtype":"F32","shape":[6],"data_offsets":[0,24]},"b":{"dtype":"F32","shape":[6],"data_offsets":[28,52]}}`, make([]byte, 52)),
			`gap of 4 bytes at buffer offset 24 before tensor "b": the byte buffer must be entirely indexed`},
		{"gap at buffer start", build(`{"w":{"dtype":"F32","shape":[6],"data_offsets":[4,28]}}`, make([]byte, 28)), `gap of 4 bytes at buffer offset 0 before tensor "w"`},
		{"bytes after last tensor", build(`{`+okEntry+`}`, make([]byte, 32)), `8 bytes at the end of the byte buffer (offsets [24, 32)) are not covered by any tensor`},
		{"buffer without tensors", build(`{}`, make([]byte, 4)), `4 bytes at the end of the byte buffer (offsets [0, 4)) are not covered`},
		{"duplicate field", build(`{"w":{"dtype":"F32","dtype":"F32","shape":[2,3],"data_offsets":[0,24]}}`, six), `tensor "w": duplicate field dtype`},
		{"README spelling offsets", build(`{"w":{"dtype":"F32","shape":[2,3],"offsets":[0,24]}}`, six), `tensor "w": unknown field "offsets"`},
		{"missing dtype", build(`{"w":{"shape":[2,3],"data_offsets":[0,24]}}`, six), `tensor "w": missing field dtype`},
		{"missing shape", build(`{"w":{"dtype":"F32","data_offsets":[0,24]}}`, six), `tensor "w": missing field shape`},
		{"missing data_offsets", build(`{"w":{"dtype":"F32","shape":[2,3]}}`, six), `tensor "w": missing field data_offsets`},
	}
}

func TestParseRefuses(t *testing.T) {
	cases := parseRefuseCases()
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			f, err := Parse(bytes.NewReader(tc.data), int64(len(tc.data)))
			if err == nil {
				t.Fatalf("Parse accepted the file: %+v", f.Tensors)
			}
			if !errors.Is(err, ErrInvalid) {
				t.Errorf("error %q does not wrap ErrInvalid", err)
			}
			if k := errkind.Of(err); k != errkind.BadInput {
				t.Errorf("error kind = %v, want bad input", k)
			}
			if !strings.Contains(err.Error(), tc.want) {
				t.Errorf("error = %q\nwant it to contain %q", err, tc.want)
			}
		})
	}
}

func TestParseAccepts(t *testing.T) {
	// Tensors listed out of offset order, an empty tensor (a 0 dimension,
	// allowed by the README's notes) at the start, in the middle and at the
	// end, a scalar of shape [], JSON whitespace inside the object,
	// metadata, and space padding.
	header := "{\n  \"b\": {\"dtype\": \"BF16\", \"shape\": [2], \"data_offsets\": [4, 8]},\n" +
		`  "__metadata__": {"show": "Night Shift Radio", "note": "caf\u00e9 \"quoted\""},` + "\n" +
		`  "a": {"data_offsets": [0, 4], "shape": [], "dtype": "F32"},` +
		`"e0": {"dtype": "F32", "shape": [0, 3], "data_offsets": [0, 0]},` +
		`"e1": {"dtype": "F16", "shape": [3, 0], "data_offsets": [4, 4]},` +
		`"e2": {"dtype": "F16", "shape": [0], "data_offsets": [12, 12]},` +
		`"h": {"dtype": "F16", "shape": [2], "data_offsets": [8, 12]}` + "\n}   "
	buf := f32le(-2.5)
	buf = append(buf, 0x80, 0x3F, 0x00, 0xC0) // BF16 1.0, -2.0
	buf = append(buf, 0x00, 0x3C, 0xFF, 0x7B) // F16 1.0, 65504
	f := parseBytes(t, build(header, buf))

	want := []TensorInfo{
		{Name: "e0", DType: "F32", Shape: []int{0, 3}, Begin: 0, End: 0},
		{Name: "a", DType: "F32", Shape: []int{}, Begin: 0, End: 4},
		{Name: "e1", DType: "F16", Shape: []int{3, 0}, Begin: 4, End: 4},
		{Name: "b", DType: "BF16", Shape: []int{2}, Begin: 4, End: 8},
		{Name: "h", DType: "F16", Shape: []int{2}, Begin: 8, End: 12},
		{Name: "e2", DType: "F16", Shape: []int{0}, Begin: 12, End: 12},
	}
	if d := cmp.Diff(want, f.Tensors); d != "" {
		t.Errorf("Tensors (-want +got):\n%s", d)
	}
	if d := cmp.Diff(map[string]string{"show": "Night Shift Radio", "note": `café "quoted"`}, f.Metadata); d != "" {
		t.Errorf("Metadata (-want +got):\n%s", d)
	}
	for name, vals := range map[string][]float32{
		"a": {-2.5}, "b": {1, -2}, "h": {1, 65504}, "e0": {}, "e1": {}, "e2": {},
	} {
		got, err := f.Float32s(name)
		if err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		if d := cmp.Diff(vals, got); d != "" {
			t.Errorf("Float32s(%q) (-want +got):\n%s", name, d)
		}
	}
	if info, ok := f.Info("a"); !ok || info.NumElements() != 1 {
		t.Errorf("Info(a) = %+v, %v", info, ok)
	}
	if _, ok := f.Info("missing"); ok {
		t.Error("Info found a tensor that is not there")
	}
	if _, err := f.Float32s("missing"); err == nil || errkind.Of(err) != errkind.BadInput {
		t.Errorf("Float32s(missing) error = %v, want a bad-input error", err)
	}
	if f.DataOffset() != 8+int64(len(header)) {
		t.Errorf("DataOffset = %d", f.DataOffset())
	}
}

func TestRawReportsShortReader(t *testing.T) {
	data := build(refHeader, refData)
	// The caller claims the full size but the reader holds 4 bytes less:
	// the header parses, reading the tensor must fail, not return garbage.
	f, err := Parse(bytes.NewReader(data[:len(data)-4]), int64(len(data)))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := f.Raw("w"); !errors.Is(err, io.ErrUnexpectedEOF) {
		t.Errorf("Raw error = %v, want unexpected EOF", err)
	}
}

// hugeReader claims to be a file of any size; it holds only its first bytes
// and fails any read beyond them.
type hugeReader struct{ head []byte }

func (h hugeReader) ReadAt(p []byte, off int64) (int, error) {
	if off+int64(len(p)) > int64(len(h.head)) {
		return 0, errors.New("read beyond the test data")
	}
	return copy(p, h.head[off:]), nil
}

func allocated(fn func()) uint64 {
	var before, after runtime.MemStats
	runtime.ReadMemStats(&before)
	fn()
	runtime.ReadMemStats(&after)
	return after.TotalAlloc - before.TotalAlloc
}

func TestHostileHeaderLengthAllocatesNothing(t *testing.T) {
	for _, n := range []uint64{MaxHeaderSize + 1, 1 << 40, 1<<64 - 1} {
		r := hugeReader{head: le64(n)}
		var err error
		got := allocated(func() { _, err = Parse(r, 1<<50) })
		if !errors.Is(err, ErrInvalid) {
			t.Errorf("N=%d: error = %v, want ErrInvalid", n, err)
		}
		if got > 64<<10 {
			t.Errorf("N=%d: Parse allocated %d bytes before refusing", n, got)
		}
	}
	// A length within the limit but beyond the real file is refused before
	// the header buffer is allocated.
	data := append(le64(MaxHeaderSize), "{}"...)
	var err error
	got := allocated(func() { _, err = Parse(bytes.NewReader(data), int64(len(data))) })
	if !errors.Is(err, ErrInvalid) || got > 64<<10 {
		t.Errorf("error = %v, allocated %d bytes", err, got)
	}
}

// maxAllocPerHeaderByte bounds what Parse allocates per header byte; the
// fuzz target checks the same bound. Measured worst case: a shape of many
// zero dimensions (see TestParseAllocationBound).
const maxAllocPerHeaderByte = 64

func TestParseAllocationBound(t *testing.T) {
	dims := strings.TrimSuffix(strings.Repeat("0,", 200000), ",")
	for name, header := range map[string]string{
		"many dims":    `{"w":{"dtype":"F32","shape":[` + dims + `],"data_offsets":[0,0]}}`,
		"many tensors": manyTensorsHeader(24000),
		"long name":    `{"` + strings.Repeat("n", 400000) + `":{"dtype":"F32","shape":[0],"data_offsets":[0,0]}}`,
		"metadata":     `{"__metadata__":{` + manyMetadata(24000) + `}}`,
	} {
		t.Run(name, func(t *testing.T) {
			data := build(header, nil)
			var err error
			got := allocated(func() { _, err = Parse(bytes.NewReader(data), int64(len(data))) })
			if err != nil {
				t.Fatalf("Parse: %v", err)
			}
			ratio := float64(got) / float64(len(header))
			t.Logf("%d header bytes, %d allocated (%.1f per byte)", len(header), got, ratio)
			if got > uint64(maxAllocPerHeaderByte*len(data)+(1<<20)) {
				t.Errorf("allocated %d bytes for a %d-byte header, above %d per byte", got, len(header), maxAllocPerHeaderByte)
			}
		})
	}
}

func manyTensorsHeader(n int) string {
	var b strings.Builder
	b.WriteByte('{')
	for i := range n {
		if i > 0 {
			b.WriteByte(',')
		}
		fmt.Fprintf(&b, `"t%d":{"dtype":"F32","shape":[0],"data_offsets":[0,0]}`, i)
	}
	b.WriteByte('}')
	return b.String()
}

func manyMetadata(n int) string {
	parts := make([]string, n)
	for i := range parts {
		parts[i] = fmt.Sprintf(`"k%d":"v"`, i)
	}
	return strings.Join(parts, ",")
}

// BF16 bit patterns worked out by hand from the definitions: bfloat16 is the
// upper 16 bits of an IEEE 754 binary32 (Google Brain's bfloat16; Intel,
// "BFLOAT16 – Hardware Numerics Definition", 2018, which, from memory, also
// specifies round-to-nearest-even for conversion from binary32), and
// IEEE 754-2008 §4.3.1 roundTiesToEven. bf16Nearest below is an independent
// oracle for the same rule.
func TestBFloat16Bits(t *testing.T) {
	for _, tc := range []struct {
		in   uint32
		want uint16
		note string
	}{
		{0x3F800000, 0x3F80, "1.0"},
		{0xC0000000, 0xC000, "-2.0"},
		{0x00000000, 0x0000, "+0"},
		{0x80000000, 0x8000, "-0"},
		{0x3F807FFF, 0x3F80, "just below the halfway point: down"},
		{0x3F808000, 0x3F80, "halfway between 0x3F80 and 0x3F81: to even, down"},
		{0x3F808001, 0x3F81, "just above the halfway point: up"},
		{0x3F818000, 0x3F82, "halfway between 0x3F81 and 0x3F82: to even, up"},
		{0xBF818000, 0xBF82, "negative halfway: to even, away from zero"},
		{0x3FFF8000, 0x4000, "halfway with carry into the exponent: 2.0"},
		{0x7F7F0000, 0x7F7F, "largest bfloat16, exact"},
		{0x7F7F7FFF, 0x7F7F, "just below halfway to 2^128: stays finite"},
		{0x7F7F8000, 0x7F80, "halfway to 2^128, odd mantissa: rounds to +Inf"},
		{0x7F7FFFFF, 0x7F80, "largest float32: +Inf"},
		{0xFF7FFFFF, 0xFF80, "most negative float32: -Inf"},
		{0x7F800000, 0x7F80, "+Inf"},
		{0xFF800000, 0xFF80, "-Inf"},
		{0x00000001, 0x0000, "smallest float32 subnormal: below half of the smallest bfloat16 subnormal"},
		{0x00008000, 0x0000, "exactly half the smallest bfloat16 subnormal: to even, 0"},
		{0x00018000, 0x0002, "halfway between subnormals 1 and 2: to even, 2"},
		{0x7FC00000, 0x7FC0, "quiet NaN"},
		{0xFFC00000, 0xFFC0, "negative quiet NaN"},
		{0x7F800001, 0x7FC0, "NaN with payload only in the low bits: must not become +Inf"},
		{0xFFFFFFFF, 0xFFFF, "NaN with all bits set: no carry into the sign"},
	} {
		got := BFloat16Bits(math.Float32frombits(tc.in))
		if got != tc.want {
			t.Errorf("BFloat16Bits(%#08x) = %#04x, want %#04x (%s)", tc.in, got, tc.want, tc.note)
		}
	}
}

// bf16Nearest is an independent oracle: of the two bfloat16 values that
// bracket v (truncation and the next one up in magnitude), the nearer, ties
// to the even bit pattern; computed in float64, where both candidates and
// their distances to v are exact.
func bf16Nearest(v float32) uint16 {
	b := math.Float32bits(v)
	lo := uint16(b >> 16)
	if b&0xffff == 0 {
		return lo
	}
	hi := lo + 1
	dlo := math.Abs(float64(v) - float64(math.Float32frombits(uint32(lo)<<16)))
	dhi := math.Abs(float64(math.Float32frombits(uint32(hi)<<16)) - float64(v))
	switch {
	case dlo < dhi:
		return lo
	case dhi < dlo:
		return hi
	case lo%2 == 0:
		return lo
	}
	return hi
}

func TestBFloat16BitsNearestEven(t *testing.T) {
	rng := rand.New(rand.NewSource(7))
	for i := 0; i < 2_000_000; i++ {
		b := rng.Uint32()
		if i%4 == 0 {
			b = b&^0xffff | 0x8000 // force an exact tie
		}
		v := math.Float32frombits(b)
		if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) || math.Abs(float64(v)) > 3.38e38 {
			continue // NaN, Inf and overflow are covered by TestBFloat16Bits
		}
		if got, want := BFloat16Bits(v), bf16Nearest(v); got != want {
			t.Fatalf("BFloat16Bits(%#08x) = %#04x, oracle says %#04x", b, got, want)
		}
	}
}

// IEEE 754 binary16 patterns (worked by hand; the numpy cross-check
// confirms the same rounding): this tests the x448/float16 conversion that
// Write uses, through Encode and Parse.
func TestF16Rounding(t *testing.T) {
	cases := []struct {
		in   float32
		want uint16
	}{
		{1, 0x3C00},
		{-2, 0xC000},
		{65504, 0x7BFF},                                         // largest finite binary16
		{65519, 0x7BFF},                                         // below halfway to 2^16
		{65520, 0x7C00},                                         // halfway, odd mantissa: +Inf
		{float32(math.Ldexp(1, -24)), 0x0001},                   // smallest subnormal
		{float32(math.Ldexp(1, -25)), 0x0000},                   // half of it: tie to even 0
		{float32(math.Ldexp(3, -25)), 0x0002},                   // 1.5 subnormal units: tie to even 2
		{float32(1 + math.Ldexp(1, -11)), 0x3C00},               // tie between 1 and 1+2^-10: even
		{float32(1 + math.Ldexp(3, -11)), 0x3C02},               // tie between 1+2^-10 and 1+2^-9: even
		{float32(1 + math.Ldexp(1, -11) + 1.0/(1<<20)), 0x3C01}, // above the tie: up
	}
	data := make([]float32, len(cases))
	for i, c := range cases {
		data[i] = c.in
	}
	enc, err := Encode([]Tensor{{Name: "h", DType: "F16", Shape: []int{len(data)}, Data: data}}, nil)
	if err != nil {
		t.Fatal(err)
	}
	f := parseBytes(t, enc)
	raw, err := f.Raw("h")
	if err != nil {
		t.Fatal(err)
	}
	for i, c := range cases {
		if got := binary.LittleEndian.Uint16(raw[2*i:]); got != c.want {
			t.Errorf("F16(%v) = %#04x, want %#04x", c.in, got, c.want)
		}
	}
}

func specialF32() []float32 {
	return []float32{
		0, float32(math.Copysign(0, -1)), 1, -1, 0.1, -1e-3, 3.1415927,
		math.MaxFloat32, -math.MaxFloat32, math.SmallestNonzeroFloat32,
		float32(math.Inf(1)), float32(math.Inf(-1)), float32(math.NaN()),
		65504, 65520, 1e-8, 6e-5,
	}
}

func TestRoundTrip(t *testing.T) {
	rng := rand.New(rand.NewSource(42))
	f32 := specialF32()
	for range 200 {
		f32 = append(f32, math.Float32frombits(rng.Uint32()))
	}
	// F16 and BF16 sources that are exactly representable: every finite
	// non-NaN 16-bit pattern widened, so the round trip must be bit-exact.
	var f16, bf16 []float32
	for b := 0; b < 1<<16; b++ {
		if h := float16.Frombits(uint16(b)); !h.IsNaN() {
			f16 = append(f16, h.Float32())
		}
		if v := math.Float32frombits(uint32(b) << 16); !math.IsNaN(float64(v)) {
			bf16 = append(bf16, v)
		}
	}
	// Arbitrary float32 values, rounded on the way in.
	mixed := make([]float32, 0, 1000)
	for range 1000 {
		mixed = append(mixed, float32(rng.NormFloat64()*100))
	}
	mixed = append(mixed, specialF32()...)

	tensors := []Tensor{
		{Name: "listener.embedding", DType: "F32", Shape: []int{len(f32)}, Data: f32},
		{Name: "episode.f16", DType: "F16", Shape: []int{len(f16) / 2, 2}, Data: f16},
		{Name: "episode.bf16", DType: "BF16", Shape: []int{len(bf16)}, Data: bf16},
		{Name: "mixed.f16", DType: "F16", Shape: []int{len(mixed)}, Data: mixed},
		{Name: "mixed.bf16", DType: "BF16", Shape: []int{len(mixed)}, Data: mixed},
		{Name: "empty", DType: "BF16", Shape: []int{4, 0, 2}, Data: nil},
		{Name: "bias", DType: "F32", Shape: []int{}, Data: []float32{0.5}},
	}
	meta := map[string]string{"show": "Night Shift Radio", "episodes_played": "42", "": "empty key", "quote\"\\\n": "ctl\x01"}
	enc, err := Encode(tensors, meta)
	if err != nil {
		t.Fatal(err)
	}
	var buf bytes.Buffer
	n, err := Write(&buf, tensors, meta)
	if err != nil || n != int64(len(enc)) || !bytes.Equal(buf.Bytes(), enc) {
		t.Fatalf("Write returned %d, %v and %d bytes; Encode %d bytes", n, err, buf.Len(), len(enc))
	}
	f := parseBytes(t, enc)
	if (8+f.HeaderSize)%8 != 0 {
		t.Errorf("8+N = %d, not a multiple of 8", 8+f.HeaderSize)
	}
	if d := cmp.Diff(meta, f.Metadata); d != "" {
		t.Errorf("Metadata (-want +got):\n%s", d)
	}
	// Layout order is by name.
	var names []string
	for _, ti := range f.Tensors {
		names = append(names, ti.Name)
	}
	if !slices.IsSorted(names) {
		t.Errorf("tensors laid out in order %v, want sorted by name", names)
	}
	for _, in := range tensors {
		info, ok := f.Info(in.Name)
		if !ok || info.DType != in.DType || !slices.Equal(info.Shape, in.Shape) {
			t.Errorf("%s: Info = %+v, %v", in.Name, info, ok)
			continue
		}
		got, err := f.Float32s(in.Name)
		if err != nil {
			t.Fatal(err)
		}
		if len(got) != len(in.Data) {
			t.Fatalf("%s: %d values, want %d", in.Name, len(got), len(in.Data))
		}
		for i, v := range in.Data {
			var want float32
			switch in.DType {
			case "F32":
				want = v
			case "F16":
				want = float16.Fromfloat32(v).Float32()
			case "BF16":
				want = math.Float32frombits(uint32(bf16Nearest(v)) << 16)
				if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) || math.Abs(float64(v)) > 3.38e38 {
					want = math.Float32frombits(uint32(BFloat16Bits(v)) << 16)
				}
			}
			if math.IsNaN(float64(v)) {
				if !math.IsNaN(float64(got[i])) {
					t.Errorf("%s[%d]: NaN came back as %v", in.Name, i, got[i])
				}
				continue
			}
			if math.Float32bits(got[i]) != math.Float32bits(want) {
				t.Errorf("%s[%d]: %v (%#08x) came back as %v (%#08x), want %v", in.Name, i, v, math.Float32bits(v), got[i], math.Float32bits(got[i]), want)
			}
		}
	}
}

func TestWriteIsDeterministic(t *testing.T) {
	meta := map[string]string{}
	var tensors []Tensor
	for i := range 50 {
		meta[fmt.Sprintf("key%02d", i)] = fmt.Sprint(i)
		tensors = append(tensors, Tensor{Name: fmt.Sprintf("t%02d", 49-i), DType: "F32", Shape: []int{1}, Data: []float32{float32(i)}})
	}
	first, err := Encode(tensors, meta)
	if err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewSource(1))
	for range 10 {
		rng.Shuffle(len(tensors), func(i, j int) { tensors[i], tensors[j] = tensors[j], tensors[i] })
		again, err := Encode(tensors, meta)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(first, again) {
			t.Fatal("Encode output depends on input order or map iteration")
		}
	}
	// Header: __metadata__ first, no whitespace before the padding.
	n := binary.LittleEndian.Uint64(first)
	header := string(first[8 : 8+n])
	if !strings.HasPrefix(header, `{"__metadata__":{"key00":"0","key01":"1",`) {
		t.Errorf("header starts %q", header[:60])
	}
	body := strings.TrimRight(header, " ")
	if strings.ContainsAny(body, " \n\t") {
		t.Errorf("header has whitespace inside the JSON: %q", body)
	}
}

func TestWriteRefuses(t *testing.T) {
	for _, tc := range []struct {
		name    string
		tensors []Tensor
		meta    map[string]string
		want    string
	}{
		{"unsupported dtype", []Tensor{{Name: "x", DType: "I8", Shape: []int{1}, Data: []float32{1}}}, nil, `tensor "x": dtype "I8" is not supported`},
		{"negative dim", []Tensor{{Name: "x", DType: "F32", Shape: []int{-1}}}, nil, `tensor "x": shape[0] = -1 is negative`},
		{"too few values", []Tensor{{Name: "x", DType: "F32", Shape: []int{2, 2}, Data: []float32{1, 2, 3}}}, nil, `tensor "x": shape [2 2] holds 4 values, data has 3`},
		{"too many values", []Tensor{{Name: "x", DType: "BF16", Shape: []int{}, Data: []float32{1, 2}}}, nil, `shape [] holds 1 values, data has 2`},
		{"duplicate name", []Tensor{{Name: "x", DType: "F32", Shape: []int{0}}, {Name: "x", DType: "F32", Shape: []int{0}}}, nil, `duplicate tensor name "x"`},
		{"reserved name", []Tensor{{Name: "__metadata__", DType: "F32", Shape: []int{0}}}, nil, `tensor name __metadata__ is reserved`},
		{"name not UTF-8", []Tensor{{Name: "x\xff", DType: "F32", Shape: []int{0}}}, nil, `name is not valid UTF-8`},
		{"metadata not UTF-8", nil, map[string]string{"k": "\xff"}, `metadata key "k" or its value is not valid UTF-8`},
		{"header too large", []Tensor{{Name: strings.Repeat("n", MaxHeaderSize), DType: "F32", Shape: []int{0}}}, nil, "header exceeds the limit"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var buf bytes.Buffer
			n, err := Write(&buf, tc.tensors, tc.meta)
			if err == nil || !errors.Is(err, ErrInvalid) || !strings.Contains(err.Error(), tc.want) {
				t.Errorf("error = %v, want ErrInvalid containing %q", err, tc.want)
			}
			if n != 0 || buf.Len() != 0 {
				t.Errorf("wrote %d bytes (reported %d) before refusing", buf.Len(), n)
			}
		})
	}
}

// failingWriter accepts limit bytes, then fails.
type failingWriter struct{ limit int }

var errDiskFull = errors.New("disk full")

func (w *failingWriter) Write(p []byte) (int, error) {
	if len(p) <= w.limit {
		w.limit -= len(p)
		return len(p), nil
	}
	n := w.limit
	w.limit = 0
	return n, errDiskFull
}

func TestWriteReportsWriterError(t *testing.T) {
	data := make([]float32, 100000)
	n, err := Write(&failingWriter{limit: 1000}, []Tensor{{Name: "w", DType: "F32", Shape: []int{len(data)}, Data: data}}, nil)
	if !errors.Is(err, errDiskFull) {
		t.Errorf("error = %v, want the writer's error", err)
	}
	if n != 1000 {
		t.Errorf("reported %d bytes written, the writer took 1000", n)
	}
}

func FuzzParse(f *testing.F) {
	f.Add(build(refHeader, refData))
	f.Add(build(refHeader+"       ", refData))
	f.Add(build(`{"__metadata__":{"framework":"pt"}}     `, nil))
	f.Add(build(`{"a":{"dtype":"BF16","shape":[2],"data_offsets":[0,4]},"b":{"dtype":"F16","shape":[0,2],"data_offsets":[4,4]}}`, []byte{0x80, 0x3F, 0xC0, 0x7F}))
	f.Add(build(`{"a":{"dtype":"F32","shape":[1],"data_offsets":[0,4]},"a":{"dtype":"F32","shape":[1],"data_offsets":[0,4]}}`, f32le(1)))
	f.Add(build(`{"a":{"dtype":"F32","shape":[4294967296,4294967296],"data_offsets":[0,4]}}`, f32le(1)))
	f.Add(append(le64(1<<62), '{', '}'))
	f.Fuzz(func(t *testing.T, data []byte) {
		var file *File
		var err error
		got := allocated(func() { file, err = Parse(bytes.NewReader(data), int64(len(data))) })
		if limit := uint64(maxAllocPerHeaderByte*len(data) + (1 << 20)); got > limit {
			t.Fatalf("Parse of %d bytes allocated %d bytes (limit %d)", len(data), got, limit)
		}
		if err != nil {
			if !errors.Is(err, ErrInvalid) {
				t.Fatalf("error does not wrap ErrInvalid: %v", err)
			}
			return
		}
		// Accepted: the tensors tile the buffer, each read gives the
		// declared element count, and writing the values back gives a
		// file that parses to the same tensors and values.
		bufSize := int64(len(data)) - file.DataOffset()
		var covered int64
		var again []Tensor
		for _, ti := range file.Tensors {
			if ti.Begin != covered {
				t.Fatalf("tensor %q begins at %d, previous ended at %d", ti.Name, ti.Begin, covered)
			}
			covered = ti.End
			vals, err := file.Float32s(ti.Name)
			if err != nil {
				t.Fatalf("Float32s(%q): %v", ti.Name, err)
			}
			if int64(len(vals)) != ti.NumElements() {
				t.Fatalf("tensor %q: %d values for shape %v", ti.Name, len(vals), ti.Shape)
			}
			again = append(again, Tensor{Name: ti.Name, DType: ti.DType, Shape: ti.Shape, Data: vals})
		}
		if covered != bufSize {
			t.Fatalf("tensors cover %d of %d buffer bytes", covered, bufSize)
		}
		enc, err := Encode(again, file.Metadata)
		if err != nil {
			t.Fatalf("re-encoding an accepted file: %v", err)
		}
		back, err := Parse(bytes.NewReader(enc), int64(len(enc)))
		if err != nil {
			t.Fatalf("re-encoded file refused: %v", err)
		}
		for _, in := range again {
			vals, err := back.Float32s(in.Name)
			if err != nil {
				t.Fatal(err)
			}
			for i, v := range in.Data {
				if math.IsNaN(float64(v)) != math.IsNaN(float64(vals[i])) ||
					(!math.IsNaN(float64(v)) && math.Float32bits(v) != math.Float32bits(vals[i])) {
					t.Fatalf("tensor %q[%d]: %v became %v", in.Name, i, v, vals[i])
				}
			}
		}
	})
}
