package safetensors

import (
	"bytes"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"sort"
	"strings"
	"unicode/utf8"
)

// Parse reads and validates the header of the safetensors file held in r,
// whose total length is size. It reads the 8-byte length and the header
// only; tensor data is read later by Raw and Float32s.
//
// Every validation failure wraps ErrInvalid and names the offending tensor or
// field. Parse refuses: a file shorter than 8 bytes; a header length of 0,
// above MaxHeaderSize or above size-8; a header that is not UTF-8, does not
// start with '{', is not one JSON object, or is followed by anything but
// spaces; a duplicate key anywhere in the header; a __metadata__ value that
// is not an object of strings; a tensor entry with a missing, duplicate or
// unknown field; a dtype other than F32, F16 and BF16; a shape dimension that
// is not a non-negative integer; a shape whose element or byte count
// overflows int64; data_offsets that are not two non-negative integers, with
// begin > end, past the end of the byte buffer, or spanning a byte count
// other than the shape's; and tensors that overlap, leave a gap between
// them, or leave bytes at the end of the buffer uncovered.
//
// Parse allocates at most the header length (itself at most MaxHeaderSize
// and at most size-8) plus the structures decoded from it; nothing is sized
// from a header field before the field has been checked.
func Parse(r io.ReaderAt, size int64) (*File, error) {
	if size < 8 {
		return nil, invalidf("file is %d bytes, shorter than the 8-byte header length", size)
	}
	var lenBuf [8]byte
	if err := readAt(r, lenBuf[:], 0); err != nil {
		return nil, fmt.Errorf("reading safetensors header length: %w", err)
	}
	n := binary.LittleEndian.Uint64(lenBuf[:])
	switch {
	case n == 0:
		return nil, invalidf("header length is 0")
	case n > MaxHeaderSize:
		return nil, invalidf("header length %d exceeds the limit of %d bytes", n, MaxHeaderSize)
	case n > uint64(size-8):
		return nil, invalidf("header length %d exceeds the %d bytes that follow the length field", n, size-8)
	}
	header := make([]byte, n)
	if err := readAt(r, header, 8); err != nil {
		return nil, fmt.Errorf("reading safetensors header: %w", err)
	}
	tensors, meta, err := parseHeader(header)
	if err != nil {
		return nil, err
	}
	bufSize := size - 8 - int64(n)
	if err := checkLayout(tensors, bufSize); err != nil {
		return nil, err
	}
	index := make(map[string]int, len(tensors))
	for i, t := range tensors {
		index[t.Name] = i
	}
	return &File{Tensors: tensors, Metadata: meta, HeaderSize: int64(n), r: r, size: size, index: index}, nil
}

// readAt fills p from r at off; a short read is an error.
func readAt(r io.ReaderAt, p []byte, off int64) error {
	n, err := r.ReadAt(p, off)
	if n == len(p) {
		return nil
	}
	if err == nil || err == io.EOF {
		err = io.ErrUnexpectedEOF
	}
	return err
}

// parseHeader decodes the header with a token walk, so that duplicate keys
// (which a map-decoding unmarshal would silently merge) are seen, and so that
// no value of an unexpected type is ever descended into.
func parseHeader(header []byte) ([]TensorInfo, map[string]string, error) {
	if !utf8.Valid(header) {
		return nil, nil, invalidf("header is not valid UTF-8")
	}
	// The README's current wording (as quoted by third parties; the copies
	// at hand predate it): "The header data MUST begin with a { character".
	if header[0] != '{' {
		return nil, nil, invalidf("header does not start with '{' (found byte 0x%02x)", header[0])
	}
	dec := json.NewDecoder(bytes.NewReader(header))
	dec.UseNumber()
	if _, err := expectDelim(dec, '{', "header"); err != nil {
		return nil, nil, err
	}
	var (
		tensors []TensorInfo
		meta    map[string]string
		seen    = make(map[string]bool)
	)
	for dec.More() {
		key, err := objectKey(dec, "header")
		if err != nil {
			return nil, nil, err
		}
		if seen[key] {
			if key == metadataKey {
				return nil, nil, invalidf("duplicate %s key", metadataKey)
			}
			return nil, nil, invalidf("duplicate tensor name %s", quote(key))
		}
		seen[key] = true
		if key == metadataKey {
			if meta, err = parseMetadata(dec); err != nil {
				return nil, nil, err
			}
			continue
		}
		t, err := parseTensor(dec, key)
		if err != nil {
			return nil, nil, err
		}
		tensors = append(tensors, t)
	}
	if _, err := expectDelim(dec, '}', "header"); err != nil {
		return nil, nil, err
	}
	end := dec.InputOffset()
	for i := end; i < int64(len(header)); i++ {
		if header[i] != ' ' {
			return nil, nil, invalidf("header byte %d (0x%02x) follows the JSON object; only spaces may pad the header", i, header[i])
		}
	}
	return tensors, meta, nil
}

// token reads the next JSON token, turning syntax errors into ErrInvalid.
func token(dec *json.Decoder, where string) (json.Token, error) {
	tok, err := dec.Token()
	if err != nil {
		if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) {
			return nil, invalidf("header is not valid JSON: unexpected end in %s", where)
		}
		return nil, invalidf("header is not valid JSON in %s: %v", where, err)
	}
	return tok, nil
}

func expectDelim(dec *json.Decoder, want json.Delim, where string) (json.Token, error) {
	tok, err := token(dec, where)
	if err != nil {
		return nil, err
	}
	if d, ok := tok.(json.Delim); !ok || d != want {
		kind := "an object"
		switch want {
		case '[':
			kind = "an array"
		case ']', '}':
			return nil, invalidf("header is not valid JSON: %s is not closed where expected", where)
		}
		return nil, invalidf("%s is not %s (found %s)", where, kind, describe(tok))
	}
	return tok, nil
}

func objectKey(dec *json.Decoder, where string) (string, error) {
	tok, err := token(dec, where)
	if err != nil {
		return "", err
	}
	key, ok := tok.(string)
	if !ok {
		// json.Decoder only yields strings in key position; kept as a guard.
		return "", invalidf("%s has a key that is not a string", where)
	}
	return key, nil
}

// describe names a token's JSON type for an error message.
func describe(tok json.Token) string {
	switch v := tok.(type) {
	case json.Delim:
		switch v {
		case '{':
			return "an object"
		case '[':
			return "an array"
		}
		return "'" + v.String() + "'"
	case string:
		return "a string"
	case json.Number:
		return "the number " + string(v)
	case bool:
		return "a boolean"
	case nil:
		return "null"
	}
	return fmt.Sprintf("%T", tok)
}

// parseMetadata reads the __metadata__ value: an object of string values.
func parseMetadata(dec *json.Decoder) (map[string]string, error) {
	if _, err := expectDelim(dec, '{', metadataKey); err != nil {
		return nil, err
	}
	meta := make(map[string]string)
	for dec.More() {
		key, err := objectKey(dec, metadataKey)
		if err != nil {
			return nil, err
		}
		if _, dup := meta[key]; dup {
			return nil, invalidf("%s: duplicate key %s", metadataKey, quote(key))
		}
		tok, err := token(dec, metadataKey)
		if err != nil {
			return nil, err
		}
		v, ok := tok.(string)
		if !ok {
			return nil, invalidf("%s: value of %s is %s, not a string", metadataKey, quote(key), describe(tok))
		}
		meta[key] = v
	}
	if _, err := expectDelim(dec, '}', metadataKey); err != nil {
		return nil, err
	}
	return meta, nil
}

// parseTensor reads one tensor entry and checks what can be checked without
// knowing the buffer size: dtype, shape, and the byte count they imply.
func parseTensor(dec *json.Decoder, name string) (TensorInfo, error) {
	where := "tensor " + quote(name)
	if _, err := expectDelim(dec, '{', where); err != nil {
		return TensorInfo{}, err
	}
	t := TensorInfo{Name: name}
	var haveDType, haveShape, haveOffsets bool
	var offsets []int64
	for dec.More() {
		field, err := objectKey(dec, where)
		if err != nil {
			return TensorInfo{}, err
		}
		switch field {
		case "dtype":
			if haveDType {
				return TensorInfo{}, invalidf("%s: duplicate field dtype", where)
			}
			haveDType = true
			tok, err := token(dec, where)
			if err != nil {
				return TensorInfo{}, err
			}
			s, ok := tok.(string)
			if !ok {
				return TensorInfo{}, invalidf("%s: dtype is %s, not a string", where, describe(tok))
			}
			if _, ok := DTypeSize(s); !ok {
				return TensorInfo{}, invalidf("%s: dtype %s is not supported (supported: %s)", where, quote(s), supportedList())
			}
			t.DType = s
		case "shape":
			if haveShape {
				return TensorInfo{}, invalidf("%s: duplicate field shape", where)
			}
			haveShape = true
			dims, err := intArray(dec, where, "shape")
			if err != nil {
				return TensorInfo{}, err
			}
			t.Shape = make([]int, len(dims))
			for i, d := range dims {
				if d > math.MaxInt {
					return TensorInfo{}, invalidf("%s: shape[%d] = %d is out of range", where, i, d)
				}
				t.Shape[i] = int(d)
			}
		case "data_offsets":
			if haveOffsets {
				return TensorInfo{}, invalidf("%s: duplicate field data_offsets", where)
			}
			haveOffsets = true
			if offsets, err = intArray(dec, where, "data_offsets"); err != nil {
				return TensorInfo{}, err
			}
			if len(offsets) != 2 {
				return TensorInfo{}, invalidf("%s: data_offsets has %d values, want 2 ([begin, end])", where, len(offsets))
			}
			t.Begin, t.End = offsets[0], offsets[1]
		default:
			return TensorInfo{}, invalidf("%s: unknown field %s", where, quote(field))
		}
	}
	if _, err := expectDelim(dec, '}', where); err != nil {
		return TensorInfo{}, err
	}
	switch {
	case !haveDType:
		return TensorInfo{}, invalidf("%s: missing field dtype", where)
	case !haveShape:
		return TensorInfo{}, invalidf("%s: missing field shape", where)
	case !haveOffsets:
		return TensorInfo{}, invalidf("%s: missing field data_offsets", where)
	}
	if _, err := byteLen(t.DType, t.Shape); err != nil {
		return TensorInfo{}, invalidf("%s: %v", where, err)
	}
	return t, nil
}

// byteLen is product(shape) × dtype size, refusing overflow of int64. Like
// the format's reference implementation, the product is checked left to
// right, so [2^40, 2^40, 0] overflows although its product is 0.
func byteLen(dtype string, shape []int) (int64, error) {
	size, ok := DTypeSize(dtype)
	if !ok {
		return 0, fmt.Errorf("dtype %s is not supported (supported: %s)", quote(dtype), supportedList())
	}
	n := int64(1)
	for i, d := range shape {
		if d < 0 {
			return 0, fmt.Errorf("shape[%d] = %d is negative", i, d)
		}
		if d != 0 && n > math.MaxInt64/int64(d) {
			return 0, fmt.Errorf("shape %v: element count overflows int64", shape)
		}
		n *= int64(d)
	}
	if n > math.MaxInt64/int64(size) {
		return 0, fmt.Errorf("shape %v: byte count of %s overflows int64", shape, dtype)
	}
	return n * int64(size), nil
}

// intArray reads a JSON array of non-negative integers that fit in int64.
// The value is taken whole as raw JSON (the decoder checks its syntax) and
// scanned here: a token walk would allocate over a hundred bytes per
// element, letting a header of small numbers cost far more memory than its
// own size.
func intArray(dec *json.Decoder, where, field string) ([]int64, error) {
	var raw json.RawMessage
	if err := dec.Decode(&raw); err != nil {
		if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) {
			return nil, invalidf("header is not valid JSON: unexpected end in %s", where)
		}
		return nil, invalidf("header is not valid JSON in %s: %v", where, err)
	}
	// raw is one syntactically valid JSON value without surrounding space.
	if raw[0] != '[' {
		return nil, invalidf("%s: %s is %s, not an array of integers", where, field, describeRaw(raw))
	}
	// One more element than commas, when the array holds only numbers.
	out := make([]int64, 0, bytes.Count(raw, []byte{','})+1)
	pos := skipSpace(raw, 1)
	if raw[pos] == ']' {
		return out, nil
	}
	for {
		i := len(out)
		start := pos
		for pos < len(raw) && strings.IndexByte("0123456789+-.eE", raw[pos]) >= 0 {
			pos++
		}
		if pos == start {
			return nil, invalidf("%s: %s[%d] is %s, not an integer", where, field, i, describeRaw(raw[start:]))
		}
		num := raw[start:pos]
		if num[0] == '-' {
			return nil, invalidf("%s: %s[%d] = %s is negative", where, field, i, num)
		}
		if bytes.ContainsAny(num, ".eE") {
			return nil, invalidf("%s: %s[%d] = %s is not an integer", where, field, i, num)
		}
		// Only digits remain (valid JSON, no sign, fraction or exponent).
		var v int64
		for _, c := range num {
			d := int64(c - '0')
			if v > (math.MaxInt64-d)/10 {
				return nil, invalidf("%s: %s[%d] = %s is out of range", where, field, i, num)
			}
			v = v*10 + d
		}
		out = append(out, v)
		pos = skipSpace(raw, pos)
		if raw[pos] == ']' {
			return out, nil
		}
		// Valid JSON: the only other byte possible here is the comma.
		pos = skipSpace(raw, pos+1)
	}
}

func skipSpace(b []byte, pos int) int {
	for pos < len(b) && (b[pos] == ' ' || b[pos] == '\t' || b[pos] == '\n' || b[pos] == '\r') {
		pos++
	}
	return pos
}

// describeRaw names the JSON type of the value that raw starts with.
func describeRaw(raw []byte) string {
	switch raw[0] {
	case '{':
		return "an object"
	case '[':
		return "an array"
	case '"':
		return "a string"
	case 't', 'f':
		return "a boolean"
	case 'n':
		return "null"
	}
	end := 0
	for end < len(raw) && end < 32 && strings.IndexByte("0123456789+-.eE", raw[end]) >= 0 {
		end++
	}
	return "the number " + string(raw[:end])
}

// checkLayout checks every tensor against the byte buffer of bufSize bytes,
// then that the tensors tile the buffer exactly, and sorts them by offset.
//
// Why no gaps and no trailing bytes: the reference implementation refuses a
// file whose offsets do not start at 0 and follow each other, and whose last
// offset is not the end of the buffer (its MetadataIncompleteBuffer error:
// "the data offsets of the tensor does not fully cover the buffer part of
// the file"; safetensors/src/tensor.rs). The README states this as "the byte
// buffer needs to be entirely indexed, and cannot contain holes" (quoted from
// memory; the README copies at hand predate that sentence).
func checkLayout(tensors []TensorInfo, bufSize int64) error {
	for _, t := range tensors {
		where := "tensor " + quote(t.Name)
		if t.Begin > t.End {
			return invalidf("%s: data_offsets begin %d is after end %d", where, t.Begin, t.End)
		}
		if t.End > bufSize {
			return invalidf("%s: data_offsets end %d is beyond the byte buffer of %d bytes", where, t.End, bufSize)
		}
		want, err := byteLen(t.DType, t.Shape)
		if err != nil {
			return invalidf("%s: %v", where, err)
		}
		if got := t.End - t.Begin; got != want {
			return invalidf("%s: data_offsets span %d bytes, but shape %v of %s needs %d", where, got, t.Shape, t.DType, want)
		}
	}
	sort.Slice(tensors, func(i, j int) bool {
		a, b := tensors[i], tensors[j]
		if a.Begin != b.Begin {
			return a.Begin < b.Begin
		}
		if a.End != b.End {
			return a.End < b.End
		}
		return a.Name < b.Name
	})
	var covered int64
	prev := -1
	for i, t := range tensors {
		if t.Begin < covered {
			p := tensors[prev]
			return invalidf("tensors %s [%d, %d) and %s [%d, %d) overlap", quote(p.Name), p.Begin, p.End, quote(t.Name), t.Begin, t.End)
		}
		if t.Begin > covered {
			return invalidf("gap of %d bytes at buffer offset %d before tensor %s: the byte buffer must be entirely indexed", t.Begin-covered, covered, quote(t.Name))
		}
		covered = t.End
		prev = i
	}
	if covered != bufSize {
		return invalidf("%d bytes at the end of the byte buffer (offsets [%d, %d)) are not covered by any tensor", bufSize-covered, covered, bufSize)
	}
	return nil
}
