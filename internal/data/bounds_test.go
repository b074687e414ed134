package data

import (
	"bytes"
	"compress/gzip"
	"encoding/binary"
	"errors"
	"io"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"
	"github.com/parquet-go/parquet-go/encoding/thrift"
	"github.com/parquet-go/parquet-go/format"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
)

// boundsHoldout is a small Parquet holdout (three row groups) and the
// options to read it.
func boundsHoldout(t testing.TB) ([]byte, Options) {
	t.Helper()
	v := testVocab(t, model.UnknownBucket, episodeIDs(50)...)
	path := filepath.Join(t.TempDir(), "h.parquet")
	writeHoldout(t, path, HoldoutLayout{RowGroupRows: 100}, genRows(2, 300, 50, 10))
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b, Options{Spec: testSpec(v), Vocab: v, Name: "h.parquet"}
}

// readWhole opens b as a Parquet holdout and reads every row.
func readWhole(b []byte, opts Options) error {
	r, err := OpenReader(bytes.NewReader(b), int64(len(b)), FormatParquet, opts)
	if err != nil {
		return err
	}
	defer r.Close()
	var f Frame
	for {
		if _, err := r.Read(&f, 64); err != nil {
			if err == io.EOF {
				return nil
			}
			return err
		}
	}
}

// allocated returns the bytes allocated while f runs.
func allocated(f func()) uint64 {
	var a, b runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&a)
	f()
	runtime.ReadMemStats(&b)
	return b.TotalAlloc - a.TotalAlloc
}

// withFooter replaces the footer (file metadata) of a Parquet file.
func withFooter(b []byte, footer []byte) []byte {
	n := int(binary.LittleEndian.Uint32(b[len(b)-8:]))
	return assemble(b[:len(b)-8-n], footer)
}

// assemble appends a footer, its length and the magic number to body.
func assemble(body, footer []byte) []byte {
	out := append(append([]byte(nil), body...), footer...)
	out = binary.LittleEndian.AppendUint32(out, uint32(len(footer)))
	return append(out, "PAR1"...)
}

// editLastPage re-encodes the header of the first page of the column chunk
// that comes last in the file, after edit, and fixes that chunk's size in
// the footer so every other offset still holds.
func editLastPage(t *testing.T, b []byte, edit func(h *format.PageHeader)) []byte {
	t.Helper()
	return editLastPageData(t, b, func(h *format.PageHeader, _ *format.ColumnMetaData, _ []byte) []byte {
		edit(h)
		return nil
	})
}

// editLastPageData is editLastPage where edit may also change the chunk's
// metadata and replace the page's compressed data (the body after a
// version 2 page's levels), returning the new data or nil to keep it.
func editLastPageData(t *testing.T, b []byte, edit func(h *format.PageHeader, md *format.ColumnMetaData, data []byte) []byte) []byte {
	t.Helper()
	f, err := parquet.OpenFile(bytes.NewReader(b), int64(len(b)))
	if err != nil {
		t.Fatal(err)
	}
	md := *f.Metadata()
	var last *format.ColumnMetaData
	var off int64
	for g := range md.RowGroups {
		for c := range md.RowGroups[g].Columns {
			m := &md.RowGroups[g].Columns[c].MetaData
			o := m.DataPageOffset
			if m.DictionaryPageOffset != 0 {
				o = m.DictionaryPageOffset
			}
			if o >= off {
				off, last = o, m
			}
		}
	}
	var h format.PageHeader
	w := compactWalker{b: b[off:]}
	if err := w.structure(0); err != nil {
		t.Fatal(err)
	}
	if err := thrift.Unmarshal(new(thrift.CompactProtocol), b[off:off+int64(w.pos)], &h); err != nil {
		t.Fatal(err)
	}
	bodyStart := off + int64(w.pos)
	bodyEnd := bodyStart + int64(h.CompressedPageSize)
	levels := int64(0)
	if v2 := h.DataPageHeaderV2; v2.Valid {
		levels = int64(v2.V.RepetitionLevelsByteLength + v2.V.DefinitionLevelsByteLength)
	}
	body := b[bodyStart:bodyEnd]
	if data := edit(&h, last, body[levels:]); data != nil {
		body = append(append([]byte(nil), body[:levels]...), data...)
		h.CompressedPageSize = int32(len(body))
	}
	enc, err := thrift.Marshal(new(thrift.CompactProtocol), &h)
	if err != nil {
		t.Fatal(err)
	}
	last.TotalCompressedSize += int64(len(enc)+len(body)) - (bodyEnd - off)
	footer, err := thrift.Marshal(new(thrift.CompactProtocol), &md)
	if err != nil {
		t.Fatal(err)
	}
	n := int64(binary.LittleEndian.Uint32(b[len(b)-8:]))
	out := append(append(append([]byte(nil), b[:off]...), enc...), body...)
	return assemble(append(out, b[bodyEnd:int64(len(b))-8-n]...), footer)
}

// zstdFrame is a zstd frame (RFC 8878) that declares content bytes of
// content (a single segment) and holds one raw block of data.
func zstdFrame(content uint64, data []byte) []byte {
	out := binary.LittleEndian.AppendUint32(nil, 0xfd2fb528)
	out = append(out, 0xe0) // 8-byte content size, single segment
	out = binary.LittleEndian.AppendUint64(out, content)
	hdr := uint32(len(data))<<3 | 1 // raw, last
	out = append(out, byte(hdr), byte(hdr>>8), byte(hdr>>16))
	return append(out, data...)
}

// TestParquetDeclaredSizesBounded: a Parquet holdout whose length fields
// declare gigabytes (the footer length, a list count in the footer, a
// page's sizes or value count) is refused as bad input, naming the file,
// before anything of that size is allocated. Without the checks the
// Parquet library (parquet-go v0.32) allocates what the field says before
// reading: 4 GiB for the footer length, 2.9 GB for the compressed page
// size, 2^30 structures of 96 bytes for the list count, the 8 GiB a zstd
// frame declares and the 4 GiB of a snappy block; its gzip decoder grows
// its buffer for as long as output comes, and its LZ4_RAW decoder doubles
// its buffer on any error until memory runs out (found by FuzzParquet).
// The uncompressed size (allocated when a page is decompressed) and the
// value count are refused by the limits as well.
func TestParquetDeclaredSizesBounded(t *testing.T) {
	clean, opts := boundsHoldout(t)
	if err := readWhole(clean, opts); err != nil {
		t.Fatalf("the clean file: %v", err)
	}
	base := allocated(func() { readWhole(clean, opts) })
	const huge = 1<<31 - 1

	// A footer of a few bytes: FileMetaData{version: 1, schema: a list
	// that declares 2^30 structures}.
	listBomb := []byte{0x15, 0x02, 0x19, 0xfc}
	listBomb = binary.AppendUvarint(listBomb, 1<<30)
	listBomb = append(listBomb, 0x00, 0x00, 0x00)

	cases := []struct {
		name string
		file []byte
		want string
	}{
		{"footer length 4 GiB", func() []byte {
			b := append([]byte(nil), clean...)
			binary.LittleEndian.PutUint32(b[len(b)-8:], 0xfffffff0)
			return b
		}(), "footer length 4294967280"},
		{"footer list of 2^30 elements", withFooter(clean, listBomb), "declares 1073741824 elements"},
		{"page compressed size 2 GiB", editLastPage(t, clean, func(h *format.PageHeader) { h.CompressedPageSize = huge }), "compressed size 2147483647"},
		{"page uncompressed size 2 GiB", editLastPage(t, clean, func(h *format.PageHeader) { h.UncompressedPageSize = huge }), "2147483647 (uncompressed)"},
		{"page of 2^31 values", editLastPage(t, clean, func(h *format.PageHeader) {
			if h.DataPageHeaderV2.Valid {
				h.DataPageHeaderV2.V.NumValues = huge
			} else {
				h.DataPageHeader.V.NumValues = huge
			}
		}), "2147483647 values"},
		{"zstd frame declaring 8 GiB", editLastPageData(t, clean, func(_ *format.PageHeader, _ *format.ColumnMetaData, _ []byte) []byte {
			return zstdFrame(8<<30, []byte("listener"))
		}), "declares 8589934592 bytes of content"},
		{"zstd blocks making 80 MiB", editLastPageData(t, clean, func(_ *format.PageHeader, _ *format.ColumnMetaData, _ []byte) []byte {
			out := binary.LittleEndian.AppendUint32(nil, 0xfd2fb528)
			out = append(out, 0x00, 0x58) // no content size; window 2^(10+11) = 2 MiB
			for i := range 40 {           // RLE blocks of 2 MiB - 1 bytes
				hdr := uint32(2<<20-1)<<3 | 1<<1
				if i == 39 {
					hdr |= 1
				}
				out = append(out, byte(hdr), byte(hdr>>8), byte(hdr>>16), 'x')
			}
			return out
		}), "decompress to more than"},
		{"snappy decoded length 4 GiB", editLastPageData(t, clean, func(_ *format.PageHeader, md *format.ColumnMetaData, _ []byte) []byte {
			md.Codec = format.Snappy
			return append(binary.AppendUvarint(nil, 1<<32-1), 0, 0, 0, 0)
		}), "decoded length 4294967295"},
		{"gzip page of 100 MiB", editLastPageData(t, clean, func(_ *format.PageHeader, md *format.ColumnMetaData, _ []byte) []byte {
			md.Codec = format.Gzip
			var z bytes.Buffer
			zw := gzip.NewWriter(&z)
			zw.Write(make([]byte, 100<<20))
			zw.Close()
			return z.Bytes()
		}), "decompresses to more than"},
		{"LZ4_RAW codec", editLastPageData(t, clean, func(_ *format.PageHeader, md *format.ColumnMetaData, _ []byte) []byte {
			md.Codec = format.Lz4Raw
			return []byte{0xff, 0xff, 0xff}
		}), "LZ4_RAW is not supported"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var err error
			n := allocated(func() { err = readWhole(c.file, opts) })
			if err == nil {
				t.Fatal("the file was read")
			}
			if !errkind.Is(err, errkind.BadInput) || !strings.Contains(err.Error(), "h.parquet") || !strings.Contains(err.Error(), c.want) {
				t.Errorf("error %v: want bad input naming h.parquet and %q", err, c.want)
			}
			// The clean read allocates about half a megabyte.
			if n > base+8<<20 {
				t.Errorf("allocated %d bytes (the clean file: %d)", n, base)
			}
		})
	}
}

// TestParquetBoundsAcceptRealFiles: the checks pass files with many row
// groups, dictionary pages and long lists.
func TestParquetBoundsAcceptRealFiles(t *testing.T) {
	v := testVocab(t, model.UnknownBucket, episodeIDs(500)...)
	opts := Options{Spec: testSpec(v, denseAge, denseAffinity), Vocab: v, Name: "big.parquet"}
	path := filepath.Join(t.TempDir(), "big.parquet")
	writeBig(t, path, 24000, 500, 300, denseAge, denseAffinity)
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if err := readWhole(b, opts); err != nil {
		t.Fatal(err)
	}
}

// TestCompactWalker checks the walker on metadata the thrift encoder
// writes, and on cut and inflated input.
func TestCompactWalker(t *testing.T) {
	clean, _ := boundsHoldout(t)
	n := int(binary.LittleEndian.Uint32(clean[len(clean)-8:]))
	footer := clean[len(clean)-8-n : len(clean)-8]
	w := compactWalker{b: footer}
	if err := w.structure(0); err != nil || w.pos != n {
		t.Fatalf("walking the footer: %v at %d of %d", err, w.pos, n)
	}
	for cut := range n {
		w := compactWalker{b: footer[:cut]}
		if err := w.structure(0); !errors.Is(err, io.ErrUnexpectedEOF) {
			t.Fatalf("footer cut at %d: %v, want unexpected EOF", cut, err)
		}
	}
	deep := bytes.Repeat([]byte{0x1c}, 100) // nested struct fields
	if err := (&compactWalker{b: deep}).structure(0); !errors.Is(err, errThriftDepth) {
		t.Errorf("deep nesting: %v", err)
	}
}

// FuzzParquet reads holdouts made by mutating a small Parquet file: the
// reader returns rows or a bad-input error naming the file; it never
// panics.
func FuzzParquet(f *testing.F) {
	clean, opts := boundsHoldout(f)
	f.Add(clean)
	f.Add(clean[:len(clean)/2])
	f.Add(withFooter(clean, []byte{0x15, 0x02, 0x19, 0xfc, 0x80, 0x80, 0x80, 0x80, 0x04, 0x00}))
	f.Fuzz(func(t *testing.T, b []byte) {
		err := readWhole(b, opts)
		if err != nil && !strings.Contains(err.Error(), "h.parquet") {
			t.Errorf("error %v does not name the file", err)
		}
	})
}
