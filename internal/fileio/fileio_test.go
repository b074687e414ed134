package fileio

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"io"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestCopyHashing: the copy is byte-identical and the hash is sha256 of
// what was copied — the FIPS 180-2 example digests (Appendix B.1 "abc",
// B.2 the 448-bit message) and the standard library's one-shot sha256 of
// sizes around the chunk size.
func TestCopyHashing(t *testing.T) {
	cases := map[string]string{
		"abc": "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad",
		"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq": "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1",
	}
	for msg, want := range cases {
		var out bytes.Buffer
		h := sha256.New()
		n, err := CopyHashing(context.Background(), &out, strings.NewReader(msg), h)
		if err != nil || n != int64(len(msg)) || out.String() != msg {
			t.Fatalf("copy of %q: %d, %v, %q", msg, n, err, out.String())
		}
		if got := hex.EncodeToString(h.Sum(nil)); got != want {
			t.Errorf("sha256(%q) = %s, want %s", msg, got, want)
		}
	}
	r := rand.New(rand.NewPCG(3, 4))
	for _, size := range []int{0, 1, CopyBuffer - 1, CopyBuffer, CopyBuffer + 1, 5*CopyBuffer + 77} {
		data := make([]byte, size)
		for i := range data {
			data[i] = byte(r.Uint32())
		}
		// A prefix already in the hash stays part of the sum.
		h := sha256.New()
		h.Write([]byte("prefix"))
		var out bytes.Buffer
		n, err := CopyHashing(context.Background(), &out, iotestHalfReader{bytes.NewReader(data)}, h)
		if err != nil || n != int64(size) || !bytes.Equal(out.Bytes(), data) {
			t.Fatalf("size %d: %d, %v, equal=%v", size, n, err, bytes.Equal(out.Bytes(), data))
		}
		want := sha256.Sum256(append([]byte("prefix"), data...))
		if !bytes.Equal(h.Sum(nil), want[:]) {
			t.Errorf("size %d: hash differs from sha256.Sum256", size)
		}
	}
}

// iotestHalfReader returns at most half of what is asked, to exercise
// short reads.
type iotestHalfReader struct{ r io.Reader }

func (h iotestHalfReader) Read(p []byte) (int, error) { return h.r.Read(p[:(len(p)+1)/2]) }

type failWriter struct{ after int }

func (f *failWriter) Write(p []byte) (int, error) {
	if f.after <= 0 {
		return 0, errors.New("disk full")
	}
	f.after--
	return len(p), nil
}

func TestCopyHashingErrors(t *testing.T) {
	data := bytes.Repeat([]byte{7}, 3*CopyBuffer)
	if _, err := CopyHashing(context.Background(), &failWriter{after: 1}, bytes.NewReader(data), sha256.New()); err == nil || err.Error() != "disk full" {
		t.Errorf("writer failure: got %v", err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := CopyHashing(ctx, io.Discard, bytes.NewReader(data), sha256.New()); !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled context: got %v", err)
	}
	readErr := errors.New("read failed")
	if _, err := CopyHashing(context.Background(), io.Discard, io.MultiReader(bytes.NewReader(data), errReader{readErr}), sha256.New()); !errors.Is(err, readErr) {
		t.Errorf("reader failure: got %v", err)
	}
}

type errReader struct{ err error }

func (e errReader) Read([]byte) (int, error) { return 0, e.err }

// TestWriteback: the file holds exactly what was written, across several
// write-back chunks and from a non-zero starting offset.
func TestWriteback(t *testing.T) {
	f, err := os.Create(filepath.Join(t.TempDir(), "blob"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if _, err := f.Write([]byte("head")); err != nil {
		t.Fatal(err)
	}
	w := NewWriteback(f)
	data := make([]byte, 2*WritebackChunk+12345)
	for i := range data {
		data[i] = byte(i * 31)
	}
	for p := data; len(p) > 0; {
		k := min(len(p), 3<<20)
		if n, err := w.Write(p[:k]); n != k || err != nil {
			t.Fatal(n, err)
		}
		p = p[k:]
	}
	if err := f.Sync(); err != nil {
		t.Fatal(err)
	}
	got, err := os.ReadFile(f.Name())
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got, append([]byte("head"), data...)) {
		t.Error("file content differs from what was written")
	}
	if w.off != int64(len(got)) || w.started == 4 {
		t.Errorf("offsets: wrote up to %d, write-back started up to %d", w.off, w.started)
	}
}
