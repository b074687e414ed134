package fileio

import (
	"errors"
	"os"
	"path/filepath"
	"syscall"
	"testing"
)

// TestOpenRegular: a regular file opens; a named pipe with no writer and a
// directory are refused at once (the open does not wait for a writer).
func TestOpenRegular(t *testing.T) {
	dir := t.TempDir()
	reg := filepath.Join(dir, "a.txt")
	if err := os.WriteFile(reg, []byte("abc"), 0o644); err != nil {
		t.Fatal(err)
	}
	b, err := ReadRegular(reg, 3)
	if err != nil || string(b) != "abc" {
		t.Fatalf("ReadRegular: %q, %v", b, err)
	}
	if _, err := ReadRegular(reg, 2); err == nil {
		t.Fatal("a 3-byte file read under a 2-byte limit")
	}
	pipe := filepath.Join(dir, "p")
	if err := syscall.Mkfifo(pipe, 0o644); err != nil {
		t.Fatal(err)
	}
	for _, p := range []string{pipe, dir} {
		if _, _, err := OpenRegular(p); !errors.Is(err, ErrNotRegular) {
			t.Errorf("OpenRegular(%s): %v, want ErrNotRegular", p, err)
		}
	}
}

// TestOpenInDir: links inside the directory are followed, links that
// leave it (absolute, or relative climbing out) are refused.
func TestOpenInDir(t *testing.T) {
	root := t.TempDir()
	dir := filepath.Join(root, "model")
	os.MkdirAll(filepath.Join(dir, "sub"), 0o755)
	os.WriteFile(filepath.Join(dir, "sub", "real.txt"), []byte("in"), 0o644)
	os.WriteFile(filepath.Join(root, "outside.txt"), []byte("out"), 0o644)
	links := map[string]string{
		"inside":   "sub/real.txt",
		"absolute": filepath.Join(root, "outside.txt"),
		"climbing": "../outside.txt",
		"twice":    "climbing", // a link to a link that leaves
	}
	for name, target := range links {
		if err := os.Symlink(target, filepath.Join(dir, name)); err != nil {
			t.Fatal(err)
		}
	}
	if b, err := ReadInDir(dir, "inside", 10); err != nil || string(b) != "in" {
		t.Errorf("inside link: %q, %v", b, err)
	}
	for _, name := range []string{"absolute", "climbing", "twice"} {
		if _, err := ReadInDir(dir, name, 10); !errors.Is(err, ErrOutside) {
			t.Errorf("%s link: %v, want ErrOutside", name, err)
		}
	}
	// The directory itself reached through a link: its files are inside.
	alias := filepath.Join(root, "alias")
	os.Symlink(dir, alias)
	if b, err := ReadInDir(alias, "inside", 10); err != nil || string(b) != "in" {
		t.Errorf("through a linked directory: %q, %v", b, err)
	}
}
