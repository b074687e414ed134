package safetensors

import "encoding/binary"

// Scanner checks a safetensors file as its bytes stream past: it is an
// io.Writer that keeps only the header. The header is validated by the same
// rules as Parse as soon as its last byte arrives; after that every stored
// value of every tensor is checked for NaN and infinity. It lets a caller
// that moves a file anyway (a push streaming it into a store, a pull
// streaming a blob onto disk) check it on the same pass, without reading it
// a second time.
//
// Write never fails, so a Scanner can sit in an io.MultiWriter beside the
// real destination; Result reports what it found.
type Scanner struct {
	size    int64 // the file size announced to NewScanner
	n       int64 // bytes seen so far
	lenBuf  [8]byte
	hlen    int64
	header  []byte
	file    *File
	bufSize int64 // size of the byte buffer, known once the header length is
	err     error // the header's first problem (sticky)

	ti        int     // index of the tensor under the scan position
	carry     [4]byte // a partial element left by the previous Write
	ncarry    int
	nonFinite map[string]int64
}

// NewScanner returns a Scanner for a file of size bytes.
func NewScanner(size int64) *Scanner {
	return &Scanner{size: size, nonFinite: map[string]int64{}}
}

// Size is the file size given to NewScanner.
func (s *Scanner) Size() int64 { return s.size }

// Write takes the next bytes of the file; it always consumes all of p.
func (s *Scanner) Write(p []byte) (int, error) {
	total := len(p)
	for len(p) > 0 && s.err == nil {
		switch {
		case s.n < 8:
			k := copy(s.lenBuf[s.n:], p)
			s.n += int64(k)
			p = p[k:]
			if s.n == 8 {
				s.startHeader()
			}
		case s.file == nil:
			k := min(int64(len(p)), s.hlen-int64(len(s.header)))
			s.header = append(s.header, p[:k]...)
			s.n += k
			p = p[k:]
			if int64(len(s.header)) == s.hlen {
				s.endHeader()
			}
		default:
			off := s.n - s.file.DataOffset()
			if off >= s.bufSize {
				s.n += int64(len(p)) // beyond the announced size: Result says so
				return total, nil
			}
			k := min(int64(len(p)), s.bufSize-off)
			s.scan(off, p[:k])
			s.n += k
			p = p[k:]
		}
	}
	s.n += int64(len(p)) // after a header error only the count matters
	return total, nil
}

func (s *Scanner) startHeader() {
	n := binary.LittleEndian.Uint64(s.lenBuf[:])
	switch {
	case s.size < 8:
		s.err = invalidf("file is %d bytes, shorter than the 8-byte header length", s.size)
	case n == 0:
		s.err = invalidf("header length is 0")
	case n > MaxHeaderSize:
		s.err = invalidf("header length %d exceeds the limit of %d bytes", n, MaxHeaderSize)
	case n > uint64(s.size-8):
		s.err = invalidf("header length %d exceeds the %d bytes that follow the length field", n, s.size-8)
	default:
		s.hlen = int64(n)
		s.header = make([]byte, 0, n)
	}
}

func (s *Scanner) endHeader() {
	tensors, meta, err := parseHeader(s.header)
	if err != nil {
		s.err = err
		return
	}
	s.bufSize = s.size - 8 - s.hlen
	if err := checkLayout(tensors, s.bufSize); err != nil {
		s.err = err
		return
	}
	index := make(map[string]int, len(tensors))
	for i, t := range tensors {
		index[t.Name] = i
	}
	s.file = &File{Tensors: tensors, Metadata: meta, HeaderSize: s.hlen, size: s.size, index: index}
	s.header = nil
}

// scan checks b, the byte buffer's bytes from offset off on. Tensors tile
// the buffer in order (checkLayout), so the scan walks them forward.
func (s *Scanner) scan(off int64, b []byte) {
	for len(b) > 0 {
		t := &s.file.Tensors[s.ti]
		if off >= t.End {
			s.ti++
			s.ncarry = 0
			continue
		}
		k := min(int64(len(b)), t.End-off)
		part := b[:k]
		if _, done := s.nonFinite[t.Name]; !done {
			s.scanTensor(t, off-t.Begin, part)
		}
		off += k
		b = b[k:]
	}
}

// scanTensor checks part, the tensor's bytes from byte pos on, joining an
// element split across two Writes through carry.
func (s *Scanner) scanTensor(t *TensorInfo, pos int64, part []byte) {
	es, _ := DTypeSize(t.DType)
	if s.ncarry > 0 {
		k := min(es-s.ncarry, len(part))
		copy(s.carry[s.ncarry:], part[:k])
		s.ncarry += k
		part = part[k:]
		pos += int64(k)
		if s.ncarry < es {
			return
		}
		s.ncarry = 0
		if _, bad := FirstNonFinite(t.DType, s.carry[:es]); bad {
			s.nonFinite[t.Name] = pos/int64(es) - 1
			return
		}
	}
	whole := len(part) / es * es
	if i, bad := FirstNonFinite(t.DType, part[:whole]); bad {
		s.nonFinite[t.Name] = pos/int64(es) + int64(i)
		return
	}
	s.ncarry = copy(s.carry[:], part[whole:])
}

// Result returns the validated header and, for each tensor holding a NaN
// or an infinity, the flat index of its first one. The error wraps
// ErrInvalid when the header is invalid or fewer or more bytes than
// announced went past.
func (s *Scanner) Result() (*File, map[string]int64, error) {
	if s.err != nil {
		return nil, nil, s.err
	}
	if s.n != s.size {
		return nil, nil, invalidf("%d bytes went past, the file was announced as %d bytes", s.n, s.size)
	}
	if s.file == nil { // unreachable when n == size >= 8; kept for size < 8
		return nil, nil, invalidf("file is %d bytes, shorter than the 8-byte header length", s.size)
	}
	return s.file, s.nonFinite, nil
}

// Lane constants of FirstNonFinite's word-at-a-time test. An element is
// NaN or infinite when its exponent field is all ones (IEEE 754-2019 §3.4
// for binary32 and binary16; bfloat16 keeps binary32's 8-bit exponent).
// Adding the exponent's lowest bit to the masked exponent carries into the
// lane's sign bit exactly when the exponent is all ones, and never beyond
// the lane, so eight bytes are tested with an and, an add and an or.
const (
	expF32  = 0x7f800000_7f800000
	incF32  = 0x00800000_00800000
	expF16  = 0x7c00_7c00_7c00_7c00
	incF16  = 0x0400_0400_0400_0400
	expBF16 = 0x7f80_7f80_7f80_7f80
	incBF16 = 0x0080_0080_0080_0080
	sign32  = 0x80000000_80000000
	sign16  = 0x8000_8000_8000_8000
)

// FirstNonFinite finds the first NaN or infinity among little-endian
// stored values of dtype (F32, F16 or BF16) and returns its element index.
// len(raw) must be a multiple of the element size. It tests 32 bytes per
// step (see the lane constants) and looks at single elements only in the
// step that holds a hit and in the tail.
func FirstNonFinite(dtype string, raw []byte) (int, bool) {
	var mask, inc, sign uint64
	es := 2
	switch dtype {
	case F32:
		mask, inc, sign, es = expF32, incF32, sign32, 4
	case F16:
		mask, inc, sign = expF16, incF16, sign16
	case BF16:
		mask, inc, sign = expBF16, incBF16, sign16
	default:
		return 0, false
	}
	i := 0
	for ; i+32 <= len(raw); i += 32 {
		w := raw[i : i+32 : i+32]
		acc := (binary.LittleEndian.Uint64(w[0:])&mask + inc) |
			(binary.LittleEndian.Uint64(w[8:])&mask + inc) |
			(binary.LittleEndian.Uint64(w[16:])&mask + inc) |
			(binary.LittleEndian.Uint64(w[24:])&mask + inc)
		if acc&sign != 0 {
			break
		}
	}
	lane := uint64(mask & (1<<(8*es) - 1))
	for ; i+es <= len(raw); i += es {
		var v uint64
		if es == 4 {
			v = uint64(binary.LittleEndian.Uint32(raw[i:]))
		} else {
			v = uint64(binary.LittleEndian.Uint16(raw[i:]))
		}
		if v&lane == lane {
			return i / es, true
		}
	}
	return 0, false
}
