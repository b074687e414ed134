package registry_test

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"io"
	"math/rand/v2"
	"os"
	"path/filepath"
	"testing"

	v1 "github.com/google/go-containerregistry/pkg/v1"

	"github.com/modelgate/modelgate/internal/registry"
)

const benchBlobSize = 200 << 20

// benchSource writes benchBlobSize pseudo-random bytes (fixed seed) to a
// file in dir and returns its path and digest.
func benchSource(b *testing.B, dir string) (string, v1.Hash) {
	b.Helper()
	p := filepath.Join(dir, "source.bin")
	f, err := os.Create(p)
	if err != nil {
		b.Fatal(err)
	}
	h := sha256.New()
	r := rand.NewChaCha8([32]byte{'p', 'o', 'd', 'c', 'a', 's', 't'})
	if _, err := io.CopyN(io.MultiWriter(f, h), r, benchBlobSize); err != nil {
		b.Fatal(err)
	}
	if err := f.Close(); err != nil {
		b.Fatal(err)
	}
	return p, v1.Hash{Algorithm: "sha256", Hex: hex.EncodeToString(h.Sum(nil))}
}

// BenchmarkLocalPutBlob streams the source file into a store: hash, write,
// fsync, rename, fsync the folder. Compare with BenchmarkFileCopy.
func BenchmarkLocalPutBlob(b *testing.B) {
	dir := b.TempDir()
	src, dgst := benchSource(b, dir)
	l, err := registry.OpenLocal(filepath.Join(dir, "store"))
	if err != nil {
		b.Fatal(err)
	}
	blobFile := filepath.Join(l.Dir(), "blobs", "sha256", dgst.Hex)
	b.SetBytes(benchBlobSize)
	b.ResetTimer()
	for range b.N {
		b.StopTimer()
		os.Remove(blobFile)
		f, err := os.Open(src)
		if err != nil {
			b.Fatal(err)
		}
		b.StartTimer()
		if err := l.PutBlob(context.Background(), "bench/blob", dgst, benchBlobSize, f); err != nil {
			b.Fatal(err)
		}
		f.Close()
	}
}

// BenchmarkFileCopy is the baseline for PutBlob: io.Copy from file to file
// (which Linux may serve with copy_file_range, without user-space copies)
// and an fsync, on the same disk.
func BenchmarkFileCopy(b *testing.B) {
	dir := b.TempDir()
	src, _ := benchSource(b, dir)
	dst := filepath.Join(dir, "copy.bin")
	b.SetBytes(benchBlobSize)
	b.ResetTimer()
	for range b.N {
		b.StopTimer()
		os.Remove(dst)
		in, err := os.Open(src)
		if err != nil {
			b.Fatal(err)
		}
		b.StartTimer()
		out, err := os.Create(dst)
		if err != nil {
			b.Fatal(err)
		}
		if _, err := io.Copy(out, in); err != nil {
			b.Fatal(err)
		}
		if err := out.Sync(); err != nil {
			b.Fatal(err)
		}
		out.Close()
		in.Close()
	}
}

// BenchmarkFileCopyUserspace is a second baseline: the same copy through a
// 1 MiB user-space buffer (what any hashing copy must do), with fsync.
func BenchmarkFileCopyUserspace(b *testing.B) {
	dir := b.TempDir()
	src, _ := benchSource(b, dir)
	dst := filepath.Join(dir, "copy.bin")
	buf := make([]byte, 1<<20)
	b.SetBytes(benchBlobSize)
	b.ResetTimer()
	for range b.N {
		b.StopTimer()
		os.Remove(dst)
		in, err := os.Open(src)
		if err != nil {
			b.Fatal(err)
		}
		b.StartTimer()
		out, err := os.Create(dst)
		if err != nil {
			b.Fatal(err)
		}
		// Hide ReadFrom/WriteTo so the buffer is really used.
		if _, err := io.CopyBuffer(struct{ io.Writer }{out}, struct{ io.Reader }{in}, buf); err != nil {
			b.Fatal(err)
		}
		if err := out.Sync(); err != nil {
			b.Fatal(err)
		}
		out.Close()
		in.Close()
	}
}

// BenchmarkLocalBlobRead reads a stored blob to the end through the
// verifying reader. Compare with BenchmarkFileRead and BenchmarkFileCopy.
func BenchmarkLocalBlobRead(b *testing.B) {
	dir := b.TempDir()
	src, dgst := benchSource(b, dir)
	l, err := registry.OpenLocal(filepath.Join(dir, "store"))
	if err != nil {
		b.Fatal(err)
	}
	f, err := os.Open(src)
	if err != nil {
		b.Fatal(err)
	}
	if err := l.PutBlob(context.Background(), "bench/blob", dgst, benchBlobSize, f); err != nil {
		b.Fatal(err)
	}
	f.Close()
	b.SetBytes(benchBlobSize)
	b.ResetTimer()
	for range b.N {
		rc, err := l.Blob(context.Background(), "bench/blob", dgst)
		if err != nil {
			b.Fatal(err)
		}
		if n, err := io.Copy(io.Discard, rc); err != nil || n != benchBlobSize {
			b.Fatalf("read %d bytes: %v", n, err)
		}
		rc.Close()
	}
}

// BenchmarkFileRead is the baseline for Blob reads: the same file read to
// the end with 1 MiB reads and no hashing.
func BenchmarkFileRead(b *testing.B) {
	dir := b.TempDir()
	src, _ := benchSource(b, dir)
	buf := make([]byte, 1<<20)
	b.SetBytes(benchBlobSize)
	b.ResetTimer()
	for range b.N {
		f, err := os.Open(src)
		if err != nil {
			b.Fatal(err)
		}
		if n, err := io.CopyBuffer(struct{ io.Writer }{io.Discard}, struct{ io.Reader }{f}, buf); err != nil || n != benchBlobSize {
			b.Fatalf("read %d bytes: %v", n, err)
		}
		f.Close()
	}
}
