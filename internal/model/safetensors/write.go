package safetensors

import (
	"bufio"
	"bytes"
	"encoding/binary"
	"fmt"
	"io"
	"math"
	"sort"
	"strconv"
	"unicode/utf8"

	"github.com/x448/float16"
)

// Tensor is one tensor to write: values in C order, held as float32 whatever
// the dtype they are stored as.
type Tensor struct {
	Name  string
	DType string
	Shape []int
	Data  []float32
}

// Write writes tensors and metadata to w as one safetensors file and returns
// the number of bytes written.
//
// The output is deterministic: tensors are laid out in the byte buffer in
// order of name (byte-wise), contiguously from offset 0; the header is JSON
// without extra whitespace, with __metadata__ first (its keys sorted; omitted
// when metadata is empty) and each tensor's fields in the order dtype, shape,
// data_offsets; it is right-padded with spaces so that 8+N is a multiple of 8.
// F16 values are rounded to nearest, ties to even, overflowing to ±Inf; BF16
// likewise, with NaN kept NaN.
//
// Write refuses (with an error wrapping ErrInvalid, before writing anything)
// an unsupported dtype, a negative dimension, a data length that does not
// match the shape, a duplicate name, the name __metadata__, names or metadata
// that are not valid UTF-8, and a header above MaxHeaderSize.
func Write(w io.Writer, tensors []Tensor, metadata map[string]string) (int64, error) {
	order, header, err := plan(tensors, metadata)
	if err != nil {
		return 0, err
	}
	cw := &countingWriter{w: w}
	bw := bufio.NewWriterSize(cw, 64<<10)
	bw.Write(binary.LittleEndian.AppendUint64(nil, uint64(len(header))))
	bw.Write(header)
	chunk := make([]byte, 0, 32<<10)
	for _, i := range order {
		t := &tensors[i]
		for start := 0; start < len(t.Data); start += 4 << 10 {
			vals := t.Data[start:min(start+4<<10, len(t.Data))]
			chunk = chunk[:0]
			switch t.DType {
			case F32:
				for _, v := range vals {
					chunk = binary.LittleEndian.AppendUint32(chunk, math.Float32bits(v))
				}
			case F16:
				for _, v := range vals {
					chunk = binary.LittleEndian.AppendUint16(chunk, float16.Fromfloat32(v).Bits())
				}
			case BF16:
				for _, v := range vals {
					chunk = binary.LittleEndian.AppendUint16(chunk, BFloat16Bits(v))
				}
			}
			bw.Write(chunk)
		}
	}
	// bufio.Writer keeps the first error and returns it from Flush.
	if err := bw.Flush(); err != nil {
		return cw.n, fmt.Errorf("writing safetensors: %w", err)
	}
	return cw.n, nil
}

// Encode returns the bytes Write would write.
func Encode(tensors []Tensor, metadata map[string]string) ([]byte, error) {
	var buf bytes.Buffer
	if _, err := Write(&buf, tensors, metadata); err != nil {
		return nil, err
	}
	return buf.Bytes(), nil
}

// BFloat16Bits converts f to the bits of a bfloat16 (the upper half of an
// IEEE 754 binary32), rounding to nearest with ties to even; values beyond
// the largest bfloat16 round to ±Inf, and a NaN stays a (quiet) NaN with its
// sign, even one whose payload lies only in the discarded low bits.
func BFloat16Bits(f float32) uint16 {
	b := math.Float32bits(f)
	if b&0x7fffffff > 0x7f800000 {
		return uint16(b>>16) | 0x0040
	}
	// Adding 0x7fff rounds up anything above the halfway point; adding the
	// lowest kept bit as well makes an exact tie round up only when that
	// bit is odd. A carry out of the mantissa bumps the exponent, which is
	// the correct result (up to +Inf for the largest values).
	b += 0x7fff + (b>>16)&1
	return uint16(b >> 16)
}

// plan checks the tensors and builds the header; order lists tensor indices
// sorted by name, the layout order of the byte buffer.
func plan(tensors []Tensor, metadata map[string]string) ([]int, []byte, error) {
	order := make([]int, len(tensors))
	for i := range order {
		order[i] = i
	}
	sort.Slice(order, func(a, b int) bool { return tensors[order[a]].Name < tensors[order[b]].Name })

	var h bytes.Buffer
	h.WriteByte('{')
	if len(metadata) > 0 {
		keys := make([]string, 0, len(metadata))
		for k, v := range metadata {
			if !utf8.ValidString(k) || !utf8.ValidString(v) {
				return nil, nil, invalidf("metadata key %s or its value is not valid UTF-8", quote(k))
			}
			keys = append(keys, k)
		}
		sort.Strings(keys)
		writeJSONString(&h, metadataKey)
		h.WriteString(":{")
		for i, k := range keys {
			if i > 0 {
				h.WriteByte(',')
			}
			writeJSONString(&h, k)
			h.WriteByte(':')
			writeJSONString(&h, metadata[k])
		}
		h.WriteByte('}')
	}
	var offset int64
	for n, i := range order {
		t := &tensors[i]
		where := "tensor " + quote(t.Name)
		if n > 0 && tensors[order[n-1]].Name == t.Name {
			return nil, nil, invalidf("duplicate tensor name %s", quote(t.Name))
		}
		if t.Name == metadataKey {
			return nil, nil, invalidf("tensor name %s is reserved", metadataKey)
		}
		if !utf8.ValidString(t.Name) {
			return nil, nil, invalidf("%s: name is not valid UTF-8", where)
		}
		size, err := byteLen(t.DType, t.Shape)
		if err != nil {
			return nil, nil, invalidf("%s: %v", where, err)
		}
		elem, _ := DTypeSize(t.DType)
		if int64(len(t.Data)) != size/int64(elem) {
			return nil, nil, invalidf("%s: shape %v holds %d values, data has %d", where, t.Shape, size/int64(elem), len(t.Data))
		}
		if h.Len() > 1 {
			h.WriteByte(',')
		}
		writeJSONString(&h, t.Name)
		h.WriteString(`:{"dtype":`)
		writeJSONString(&h, t.DType)
		h.WriteString(`,"shape":[`)
		for j, d := range t.Shape {
			if j > 0 {
				h.WriteByte(',')
			}
			h.WriteString(strconv.Itoa(d))
		}
		h.WriteString(`],"data_offsets":[`)
		h.WriteString(strconv.FormatInt(offset, 10))
		h.WriteByte(',')
		offset += size
		h.WriteString(strconv.FormatInt(offset, 10))
		h.WriteString("]}")
		if h.Len() > MaxHeaderSize {
			return nil, nil, invalidf("header exceeds the limit of %d bytes", MaxHeaderSize)
		}
	}
	h.WriteByte('}')
	// Pad with spaces so that the byte buffer starts at a multiple of 8 in
	// the file (8 + N ≡ 0 mod 8), as the format's reference implementation
	// does ("Force alignment to 8 bytes" in prepare(),
	// safetensors/src/tensor.rs). N itself is then a multiple of 8 too.
	for h.Len()%8 != 0 {
		h.WriteByte(' ')
	}
	if h.Len() > MaxHeaderSize {
		return nil, nil, invalidf("header exceeds the limit of %d bytes", MaxHeaderSize)
	}
	return order, h.Bytes(), nil
}

// writeJSONString writes s (valid UTF-8) as a JSON string, escaping only
// what JSON requires: the quote, the backslash and control characters.
func writeJSONString(b *bytes.Buffer, s string) {
	const hex = "0123456789abcdef"
	b.WriteByte('"')
	for i := 0; i < len(s); i++ {
		c := s[i]
		switch {
		case c == '"' || c == '\\':
			b.WriteByte('\\')
			b.WriteByte(c)
		case c == '\n':
			b.WriteString(`\n`)
		case c == '\r':
			b.WriteString(`\r`)
		case c == '\t':
			b.WriteString(`\t`)
		case c < 0x20:
			b.WriteString(`\u00`)
			b.WriteByte(hex[c>>4])
			b.WriteByte(hex[c&0xf])
		default:
			b.WriteByte(c)
		}
	}
	b.WriteByte('"')
}

type countingWriter struct {
	w io.Writer
	n int64
}

func (c *countingWriter) Write(p []byte) (int, error) {
	n, err := c.w.Write(p)
	c.n += int64(n)
	return n, err
}
