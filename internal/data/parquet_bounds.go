package data

import (
	"compress/gzip"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"reflect"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/encoding/thrift"
	"github.com/parquet-go/parquet-go/format"
)

// Limits on what a Parquet holdout may declare. The Parquet library
// allocates what a file's length fields say before it reads the bytes they
// describe (the footer length, the element counts of the lists in the
// footer, each page header's sizes and value count), so these are checked
// first, against the file's own size and these limits: a hostile file of a
// few kilobytes cannot make the reader allocate gigabytes.
const (
	// MaxParquetFooterBytes bounds the footer (the file metadata).
	MaxParquetFooterBytes = 16 << 20
	// MaxParquetMetadataBytes bounds what decoding the footer's lists
	// costs, estimated as each list element at the size of the largest
	// metadata structure.
	MaxParquetMetadataBytes = 64 << 20
	// MaxParquetPageBytes bounds a page's compressed and uncompressed size.
	MaxParquetPageBytes = 64 << 20
	// MaxParquetPageValues bounds the number of values in one page.
	MaxParquetPageValues = 1 << 22
	// maxPageHeaderBytes bounds one page header (statistics included).
	maxPageHeaderBytes = 1 << 20
)

// thriftElemCost is the most the thrift decoder allocates for one element
// of a list in the file metadata: the size of the largest structure that
// can appear in it.
var thriftElemCost = func() int64 {
	var largest int64
	seen := map[reflect.Type]bool{}
	var walk func(reflect.Type)
	walk = func(t reflect.Type) {
		if seen[t] {
			return
		}
		seen[t] = true
		switch t.Kind() {
		case reflect.Struct:
			largest = max(largest, int64(t.Size()))
			for i := range t.NumField() {
				walk(t.Field(i).Type)
			}
		case reflect.Slice, reflect.Pointer, reflect.Map, reflect.Array:
			walk(t.Elem())
		}
	}
	walk(reflect.TypeFor[format.FileMetaData]())
	walk(reflect.TypeFor[format.PageHeader]())
	return largest
}()

// checkParquetFooter checks the footer length and the lists of the footer
// of a file that ends in a Parquet magic number; other files are left for
// the Parquet library to refuse (it allocates nothing for them).
func checkParquetFooter(r io.ReaderAt, size int64) error {
	if size < 12 {
		return nil
	}
	var tail [8]byte
	if _, err := r.ReadAt(tail[:], size-8); err != nil {
		return fmt.Errorf("reading the footer length: %w", err)
	}
	if magic := string(tail[4:]); magic != "PAR1" && magic != "PARE" {
		return nil
	}
	n := int64(binary.LittleEndian.Uint32(tail[:4]))
	switch {
	case n > size-12:
		return fmt.Errorf("footer length %d exceeds the %d bytes the file has for it", n, size-12)
	case n > MaxParquetFooterBytes:
		return fmt.Errorf("footer length %d exceeds the limit of %d bytes", n, MaxParquetFooterBytes)
	}
	if string(tail[4:]) == "PARE" {
		return nil // encrypted: the library refuses it without reading the footer's lists
	}
	footer := make([]byte, n)
	if _, err := r.ReadAt(footer, size-8-n); err != nil {
		return fmt.Errorf("reading the footer: %w", err)
	}
	w := compactWalker{b: footer}
	if err := w.structure(0); err != nil {
		return fmt.Errorf("footer: %w", err)
	}
	if w.cost > MaxParquetMetadataBytes {
		return fmt.Errorf("footer: its lists would take about %d bytes to decode, over the limit of %d", w.cost, MaxParquetMetadataBytes)
	}
	return nil
}

// checkParquetGroup walks the page headers of the reader's columns in row
// group g (0-based) and checks each chunk's codec and each page's declared
// sizes, value count and compressed data (checkCompressed) before the
// Parquet library allocates for them. win is a reusable buffer.
func checkParquetGroup(r io.ReaderAt, size int64, f *parquet.File, g int, cols []*column, win []byte) ([]byte, error) {
	rg := &f.Metadata().RowGroups[g]
	for _, c := range cols {
		if c.index < 0 || c.index >= len(rg.Columns) {
			return win, fmt.Errorf("it has %d column chunks, none for column %q", len(rg.Columns), c.name)
		}
		md := &rg.Columns[c.index].MetaData
		start := md.DataPageOffset
		if md.DictionaryPageOffset != 0 {
			start = md.DictionaryPageOffset
		}
		if start < 0 || md.TotalCompressedSize < 0 || start > size || md.TotalCompressedSize > size-start {
			return win, fmt.Errorf("column %q: its chunk (offset %d, %d bytes) is outside the %d-byte file", c.name, start, md.TotalCompressedSize, size)
		}
		if err := checkCodec(md.Codec); err != nil {
			return win, fmt.Errorf("column %q: %w", c.name, err)
		}
		var err error
		if win, err = checkChunkPages(r, start, start+md.TotalCompressedSize, md.Codec, win); err != nil {
			return win, fmt.Errorf("column %q: %w", c.name, err)
		}
	}
	return win, nil
}

// checkChunkPages walks the page headers in [off, end) of r, pages
// compressed with codec. win is a reusable buffer.
func checkChunkPages(r io.ReaderAt, off, end int64, codec format.CompressionCodec, win []byte) ([]byte, error) {
	for page := 0; off < end; page++ {
		n := min(end-off, 4<<10)
		var hlen, got int
		for {
			if int64(cap(win)) < n {
				win = make([]byte, n)
			}
			win = win[:n]
			var err error
			if got, err = r.ReadAt(win, off); err != nil && !(errors.Is(err, io.EOF) && off+n == end) {
				return win, fmt.Errorf("page %d: reading its header: %w", page, err)
			}
			w := compactWalker{b: win}
			err = w.structure(0)
			if err == nil {
				hlen = w.pos
				break
			}
			if !errors.Is(err, io.ErrUnexpectedEOF) || n == end-off || n >= maxPageHeaderBytes {
				if errors.Is(err, io.ErrUnexpectedEOF) && n >= maxPageHeaderBytes {
					return win, fmt.Errorf("page %d: header longer than %d bytes", page, maxPageHeaderBytes)
				}
				return win, fmt.Errorf("page %d: malformed header: %w", page, err)
			}
			n = min(end-off, 2*n, maxPageHeaderBytes)
		}
		var h format.PageHeader
		if err := thrift.Unmarshal(new(thrift.CompactProtocol), win[:hlen], &h); err != nil {
			return win, fmt.Errorf("page %d: malformed header: %w", page, err)
		}
		body := end - off - int64(hlen)
		values := int64(0)
		switch {
		case h.DataPageHeader.Valid:
			values = int64(h.DataPageHeader.V.NumValues)
		case h.DataPageHeaderV2.Valid:
			values = int64(h.DataPageHeaderV2.V.NumValues)
		case h.DictionaryPageHeader.Valid:
			values = int64(h.DictionaryPageHeader.V.NumValues)
		}
		switch {
		case h.CompressedPageSize < 0 || int64(h.CompressedPageSize) > body:
			return win, fmt.Errorf("page %d: compressed size %d, but %d bytes of the chunk follow its header", page, h.CompressedPageSize, body)
		case h.CompressedPageSize > MaxParquetPageBytes || h.UncompressedPageSize < 0 || h.UncompressedPageSize > MaxParquetPageBytes:
			return win, fmt.Errorf("page %d: sizes %d (compressed) and %d (uncompressed) bytes, over the limit of %d", page, h.CompressedPageSize, h.UncompressedPageSize, MaxParquetPageBytes)
		case values < 0 || values > MaxParquetPageValues:
			return win, fmt.Errorf("page %d: %d values, over the limit of %d", page, values, MaxParquetPageValues)
		}
		// The compressed part of the body: all of it, except the levels a
		// version 2 data page stores uncompressed first (or all of them).
		bodyOff, bodyLen := off+int64(hlen), int64(h.CompressedPageSize)
		if v2 := h.DataPageHeaderV2; v2.Valid {
			levels := int64(v2.V.RepetitionLevelsByteLength) + int64(v2.V.DefinitionLevelsByteLength)
			if levels > bodyLen {
				return win, fmt.Errorf("page %d: %d bytes of levels in a %d-byte page", page, levels, bodyLen)
			}
			bodyOff, bodyLen = bodyOff+levels, bodyLen-levels
			if v2.V.IsCompressed.Valid && !v2.V.IsCompressed.V {
				bodyLen = 0
			}
		}
		if bodyLen > 0 {
			// The start of the body is most often in the window read
			// for the header already.
			wr := &windowAt{r: r, buf: win[:got], off: off}
			if err := checkCompressed(wr, bodyOff, bodyLen, codec); err != nil {
				return win, fmt.Errorf("page %d: %v data: %w", page, codec, err)
			}
		}
		off += int64(hlen) + int64(h.CompressedPageSize)
	}
	return win, nil
}

// windowAt reads from r, serving a read that falls inside buf (r's bytes
// from off on) from buf.
type windowAt struct {
	r   io.ReaderAt
	buf []byte
	off int64
}

func (w *windowAt) ReadAt(p []byte, off int64) (int, error) {
	if off >= w.off && off+int64(len(p)) <= w.off+int64(len(w.buf)) {
		return copy(p, w.buf[off-w.off:]), nil
	}
	return w.r.ReadAt(p, off)
}

// checkCodec refuses the codecs whose decoder in the Parquet library does
// not bound its output (LZ4_RAW doubles its buffer on any error until
// memory runs out) or that holdouts do not need.
func checkCodec(codec format.CompressionCodec) error {
	switch codec {
	case format.Uncompressed, format.Snappy, format.Gzip, format.Zstd:
		return nil
	}
	return fmt.Errorf("compression codec %v is not supported for holdouts (use zstd, snappy, gzip or none)", codec)
}

// checkCompressed bounds what decompressing n bytes at off of r with codec
// produces, before the Parquet library's decoder sizes a buffer from it:
// snappy's decoded length (a varint the decoder allocates), zstd's frame
// content and window sizes and the output its blocks can make (the
// decoder allocates a declared content size), and gzip's output, found by
// decompressing with a limit (its decoder grows its buffer for as long as
// output comes).
func checkCompressed(r io.ReaderAt, off, n int64, codec format.CompressionCodec) error {
	switch codec {
	case format.Snappy:
		var b [binary.MaxVarintLen64]byte
		m, err := r.ReadAt(b[:min(n, int64(len(b)))], off)
		if err != nil && !errors.Is(err, io.EOF) {
			return err
		}
		v, k := binary.Uvarint(b[:m])
		if k <= 0 {
			return errors.New("no decoded length")
		}
		if v > MaxParquetPageBytes {
			return fmt.Errorf("decoded length %d, over the limit of %d", v, MaxParquetPageBytes)
		}
	case format.Zstd:
		return checkZstd(io.NewSectionReader(r, off, n), n)
	case format.Gzip:
		z, err := gzip.NewReader(io.NewSectionReader(r, off, n))
		if err != nil {
			return err
		}
		m, err := io.Copy(io.Discard, io.LimitReader(z, MaxParquetPageBytes+1))
		if err != nil {
			return err
		}
		if m > MaxParquetPageBytes {
			return fmt.Errorf("decompresses to more than %d bytes", MaxParquetPageBytes)
		}
	}
	return nil
}

// checkZstd walks the frames and block headers of zstd data (RFC 8878)
// without decoding it and bounds the output: each frame's declared content
// and window sizes, and the most its blocks can produce (a raw or RLE
// block its size, a compressed block at most 128 KiB), added over frames.
func checkZstd(r *io.SectionReader, n int64) error {
	const maxBlock = 128 << 10
	var out int64
	read := func(off int64, p []byte) error {
		if _, err := r.ReadAt(p, off); err != nil {
			if errors.Is(err, io.EOF) {
				return io.ErrUnexpectedEOF
			}
			return err
		}
		return nil
	}
	for off := int64(0); off < n; {
		var hdr [4]byte
		if err := read(off, hdr[:]); err != nil {
			return err
		}
		magic := binary.LittleEndian.Uint32(hdr[:])
		if magic&0xfffffff0 == 0x184d2a50 { // a skippable frame
			var size [4]byte
			if err := read(off+4, size[:]); err != nil {
				return err
			}
			off += 8 + int64(binary.LittleEndian.Uint32(size[:]))
			continue
		}
		if magic != 0xfd2fb528 {
			return fmt.Errorf("not a zstd frame at byte %d", off)
		}
		off += 4
		var fhd [1]byte
		if err := read(off, fhd[:]); err != nil {
			return err
		}
		off++
		single := fhd[0]&0x20 != 0
		var window uint64
		if !single {
			var wd [1]byte
			if err := read(off, wd[:]); err != nil {
				return err
			}
			off++
			base := uint64(1) << (10 + wd[0]>>3)
			window = base + base/8*uint64(wd[0]&7)
		}
		off += []int64{0, 1, 2, 4}[fhd[0]&3] // dictionary id
		fcsSize := []int{0, 2, 4, 8}[fhd[0]>>6]
		if single && fcsSize == 0 {
			fcsSize = 1
		}
		if fcsSize > 0 {
			var b [8]byte
			if err := read(off, b[:fcsSize]); err != nil {
				return err
			}
			off += int64(fcsSize)
			fcs := binary.LittleEndian.Uint64(b[:])
			if fcsSize == 2 {
				fcs += 256
			}
			if fcs > MaxParquetPageBytes {
				return fmt.Errorf("a frame declares %d bytes of content, over the limit of %d", fcs, MaxParquetPageBytes)
			}
			if single {
				window = fcs
			}
		}
		if window > MaxParquetPageBytes {
			return fmt.Errorf("a frame declares a %d-byte window, over the limit of %d", window, MaxParquetPageBytes)
		}
		for last := false; !last; {
			var bh [3]byte
			if err := read(off, bh[:]); err != nil {
				return err
			}
			off += 3
			v := uint32(bh[0]) | uint32(bh[1])<<8 | uint32(bh[2])<<16
			last = v&1 != 0
			size := int64(v >> 3)
			switch (v >> 1) & 3 {
			case 0: // raw
				out += size
				off += size
			case 1: // RLE: one byte repeated size times
				out += size
				off++
			case 2: // compressed
				out += min(maxBlock, max(int64(window), 1))
				off += size
			default:
				return fmt.Errorf("reserved block type at byte %d", off-3)
			}
			if out > MaxParquetPageBytes {
				return fmt.Errorf("its blocks decompress to more than %d bytes", MaxParquetPageBytes)
			}
			if off > n {
				return io.ErrUnexpectedEOF
			}
		}
		if fhd[0]&0x04 != 0 {
			off += 4 // content checksum
		}
	}
	return nil
}

// compactWalker walks one thrift compact-protocol structure in b without
// decoding it, refusing any list, set, map or binary that declares more
// elements or bytes than b has left (every element takes at least one
// byte), and adding up what a decoder would allocate for the lists.
type compactWalker struct {
	b    []byte
	pos  int
	cost int64
}

var errThriftDepth = errors.New("structures nested too deep")

func (w *compactWalker) byte1() (byte, error) {
	if w.pos >= len(w.b) {
		return 0, io.ErrUnexpectedEOF
	}
	w.pos++
	return w.b[w.pos-1], nil
}

func (w *compactWalker) uvarint() (uint64, error) {
	v, n := binary.Uvarint(w.b[w.pos:])
	switch {
	case n == 0:
		return 0, io.ErrUnexpectedEOF
	case n < 0:
		return 0, errors.New("varint overflows 64 bits")
	}
	w.pos += n
	return v, nil
}

func (w *compactWalker) skip(n uint64) error {
	if n > uint64(len(w.b)-w.pos) {
		return io.ErrUnexpectedEOF
	}
	w.pos += int(n)
	return nil
}

// count reads nothing: it checks that n elements of at least per bytes
// each fit in the bytes left and adds their cost. A count that does not
// fit is an io.ErrUnexpectedEOF, as the bytes may only be cut short.
func (w *compactWalker) count(n, per uint64, what string) error {
	if left := uint64(len(w.b) - w.pos); n > left/per {
		return fmt.Errorf("a %s declares %d elements with %d bytes left: %w", what, n, left, io.ErrUnexpectedEOF)
	}
	w.cost += int64(n*per) * thriftElemCost
	return nil
}

func (w *compactWalker) structure(depth int) error {
	if depth > 64 {
		return errThriftDepth
	}
	for {
		h, err := w.byte1()
		if err != nil {
			return err
		}
		if h == 0 { // stop
			return nil
		}
		if h>>4 == 0 { // long form: the field id follows as a varint
			if _, err := w.uvarint(); err != nil {
				return err
			}
		}
		if err := w.value(h&0x0f, depth); err != nil {
			return err
		}
	}
}

func (w *compactWalker) value(t byte, depth int) error {
	switch t {
	case 1, 2: // boolean true, false: in the field header
		return nil
	case 3: // byte
		return w.skip(1)
	case 4, 5, 6: // i16, i32, i64: zigzag varints
		_, err := w.uvarint()
		return err
	case 7: // double
		return w.skip(8)
	case 8: // binary
		n, err := w.uvarint()
		if err != nil {
			return err
		}
		w.cost += int64(min(n, uint64(len(w.b))))
		return w.skip(n)
	case 9, 10: // list, set
		h, err := w.byte1()
		if err != nil {
			return err
		}
		n := uint64(h >> 4)
		if n == 15 {
			if n, err = w.uvarint(); err != nil {
				return err
			}
		}
		if err := w.count(n, 1, "list"); err != nil {
			return err
		}
		elem := h & 0x0f
		for range n {
			if elem == 1 || elem == 2 { // a boolean element is one byte
				err = w.skip(1)
			} else {
				err = w.value(elem, depth+1)
			}
			if err != nil {
				return err
			}
		}
		return nil
	case 11: // map
		n, err := w.uvarint()
		if err != nil || n == 0 {
			return err
		}
		kv, err := w.byte1()
		if err != nil {
			return err
		}
		if err := w.count(n, 2, "map"); err != nil {
			return err
		}
		for range n {
			for _, e := range []byte{kv >> 4, kv & 0x0f} {
				if e == 1 || e == 2 {
					err = w.skip(1)
				} else {
					err = w.value(e, depth+1)
				}
				if err != nil {
					return err
				}
			}
		}
		return nil
	case 12: // struct
		return w.structure(depth + 1)
	}
	return fmt.Errorf("unknown thrift type %d", t)
}
