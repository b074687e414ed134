// Package safetensors reads and writes tensor files in the safetensors format:
// an 8-byte little-endian header length N, N bytes of JSON header, then a byte
// buffer holding every tensor's data in C order, little-endian.
//
// Reading is strict: the header is fully validated before any tensor byte is
// read, every tensor must lie inside the byte buffer, the tensors must cover
// the buffer exactly (no overlaps, no gaps, no trailing bytes), and no
// allocation is made from a header field before that field has been checked
// against the file size. Only the dtypes F32, F16 and BF16 are supported;
// values are handed out widened to float32.
//
// Writing is deterministic: the same tensors and metadata always give the
// same bytes.
package safetensors

import (
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"unicode/utf8"
	"unsafe"

	"github.com/x448/float16"

	"github.com/modelgate/modelgate/internal/errkind"
)

// MaxHeaderSize is the largest header length N that Parse accepts. A larger
// length is refused before anything is allocated for it, and Write refuses to
// produce a header this reader would refuse.
const MaxHeaderSize = 16 << 20

// ErrInvalid is wrapped by every error that reports a malformed or
// unsupported file (and by Write's errors for tensors it cannot encode).
// Such errors are also marked errkind.BadInput; a caller reading from a store
// may re-mark them as integrity errors.
var ErrInvalid = errors.New("invalid safetensors")

// The dtype names this package supports, as spelled in the header.
const (
	F32  = "F32"
	F16  = "F16"
	BF16 = "BF16"
)

// metadataKey is the reserved header key of the free-form string map.
const metadataKey = "__metadata__"

// DTypeSize returns the size in bytes of one element of dtype, and whether
// the dtype is supported.
func DTypeSize(dtype string) (int, bool) {
	switch dtype {
	case F32:
		return 4, true
	case F16, BF16:
		return 2, true
	}
	return 0, false
}

// TensorInfo describes one tensor of a parsed file. Begin and End are byte
// offsets relative to the start of the byte buffer (not of the file), with
// End one past the last byte.
type TensorInfo struct {
	Name  string
	DType string
	Shape []int
	Begin int64
	End   int64
}

// NumElements is the product of the shape (1 for a scalar of shape []).
func (t TensorInfo) NumElements() int64 {
	n := int64(1)
	for _, d := range t.Shape {
		n *= int64(d)
	}
	return n
}

// File is a parsed safetensors file. Its header has been validated; tensor
// data is read on demand from the underlying reader.
type File struct {
	// Tensors lists every tensor, sorted by Begin (ties, which only
	// zero-size tensors can have, by End then Name).
	Tensors []TensorInfo
	// Metadata is the header's __metadata__ map; nil when absent.
	Metadata map[string]string
	// HeaderSize is N, the header length in bytes including padding.
	HeaderSize int64

	r     io.ReaderAt
	size  int64
	index map[string]int
}

// DataOffset is the file offset of the byte buffer: 8 + HeaderSize.
func (f *File) DataOffset() int64 { return 8 + f.HeaderSize }

// Size is the file size given to Parse.
func (f *File) Size() int64 { return f.size }

// Info returns the description of the named tensor.
func (f *File) Info(name string) (TensorInfo, bool) {
	i, ok := f.index[name]
	if !ok {
		return TensorInfo{}, false
	}
	return f.Tensors[i], true
}

// Raw returns a copy of the named tensor's bytes as stored (little-endian,
// C order). Its length is End-Begin, already checked by Parse against the
// file size.
func (f *File) Raw(name string) ([]byte, error) {
	t, ok := f.Info(name)
	if !ok {
		return nil, errkind.New(errkind.BadInput, "safetensors: no tensor named %s", quote(name))
	}
	buf := make([]byte, t.End-t.Begin)
	if len(buf) == 0 {
		return buf, nil
	}
	n, err := f.r.ReadAt(buf, f.DataOffset()+t.Begin)
	if n == len(buf) {
		return buf, nil
	}
	if err == nil || err == io.EOF {
		err = io.ErrUnexpectedEOF
	}
	return nil, fmt.Errorf("reading tensor %s: %w", quote(name), err)
}

// Float32s returns the named tensor's values in C order, F16 and BF16
// widened exactly to float32.
func (f *File) Float32s(name string) ([]float32, error) {
	t, ok := f.Info(name)
	if !ok {
		return nil, errkind.New(errkind.BadInput, "safetensors: no tensor named %s", quote(name))
	}
	raw, err := f.Raw(name)
	if err != nil {
		return nil, err
	}
	return decode(t.DType, raw), nil
}

// Decode widens little-endian stored values of a supported dtype (F32,
// F16, BF16) to float32; len(raw) must be a multiple of the element size.
// It is Float32s for a caller that holds the file's bytes already.
func Decode(dtype string, raw []byte) []float32 { return decode(dtype, raw) }

// DecodeShared is Decode that, for F32 on a little-endian machine with raw
// aligned for float32, returns a view of raw instead of a copy: the
// stored bytes already are the values. The caller must not change raw, or
// unmap it, while the result is used.
func DecodeShared(dtype string, raw []byte) []float32 {
	if dtype == F32 && littleEndian && len(raw) > 0 && uintptr(unsafe.Pointer(&raw[0]))%unsafe.Alignof(float32(0)) == 0 {
		return unsafe.Slice((*float32)(unsafe.Pointer(&raw[0])), len(raw)/4)
	}
	return decode(dtype, raw)
}

// littleEndian is true on machines that store a float32's low byte first,
// as safetensors does.
var littleEndian = func() bool {
	x := uint16(1)
	return *(*byte)(unsafe.Pointer(&x)) == 1
}()

// decode widens little-endian raw bytes of a supported dtype to float32.
// len(raw) must be a multiple of the dtype size.
func decode(dtype string, raw []byte) []float32 {
	switch dtype {
	case F32:
		out := make([]float32, len(raw)/4)
		for i := range out {
			out[i] = math.Float32frombits(binary.LittleEndian.Uint32(raw[4*i:]))
		}
		return out
	case F16:
		out := make([]float32, len(raw)/2)
		for i := range out {
			out[i] = float16.Frombits(binary.LittleEndian.Uint16(raw[2*i:])).Float32()
		}
		return out
	case BF16:
		out := make([]float32, len(raw)/2)
		for i := range out {
			out[i] = math.Float32frombits(uint32(binary.LittleEndian.Uint16(raw[2*i:])) << 16)
		}
		return out
	}
	panic("safetensors: decode of unsupported dtype " + dtype)
}

// invalidError is a validation failure; it unwraps to ErrInvalid.
type invalidError struct{ msg string }

func (e *invalidError) Error() string { return ErrInvalid.Error() + ": " + e.msg }
func (e *invalidError) Unwrap() error { return ErrInvalid }

func invalidf(format string, args ...any) error {
	return errkind.Wrap(errkind.BadInput, &invalidError{msg: fmt.Sprintf(format, args...)})
}

// quote quotes a name for an error message, shortened so that a hostile
// multi-megabyte name does not end up in logs whole.
func quote(s string) string {
	const max = 64
	if len(s) <= max {
		return strconv.Quote(s)
	}
	cut := max
	for cut > 0 && !utf8.RuneStart(s[cut]) {
		cut--
	}
	return strconv.Quote(s[:cut]) + "…"
}

func supportedList() string { return strings.Join([]string{F32, F16, BF16}, ", ") }
