package data

import (
	"bufio"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
)

// atomicFile is an output file that appears at its path only when commit
// succeeds: it is written as a temporary file in the same folder, synced,
// renamed over the path, and the folder synced. Until then, and after
// abort, the path is untouched.
type atomicFile struct {
	path string
	tmp  string
	f    *os.File
	w    *bufio.Writer
	done bool
}

func createAtomic(path string) (*atomicFile, error) {
	dir, base := filepath.Split(path)
	if dir == "" {
		dir = "."
	}
	for range 100 {
		var rnd [6]byte
		if _, err := rand.Read(rnd[:]); err != nil {
			return nil, fmt.Errorf("creating %q: %w", path, err)
		}
		tmp := filepath.Join(dir, "."+base+".tmp-"+hex.EncodeToString(rnd[:]))
		// 0o666 less the umask, as os.Create would give the final file.
		f, err := os.OpenFile(tmp, os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o666)
		if errors.Is(err, fs.ErrExist) {
			continue
		}
		if err != nil {
			return nil, fmt.Errorf("creating %q: %w", path, err)
		}
		return &atomicFile{path: path, tmp: tmp, f: f, w: bufio.NewWriterSize(f, 256<<10)}, nil
	}
	return nil, fmt.Errorf("creating %q: no free temporary name", path)
}

func (a *atomicFile) Write(p []byte) (int, error) { return a.w.Write(p) }

// commit publishes the file at its path.
func (a *atomicFile) commit() error {
	if a.done {
		return errors.New("file already closed")
	}
	a.done = true
	err := a.w.Flush()
	if err == nil {
		err = a.f.Sync()
	}
	if cerr := a.f.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(a.tmp, a.path)
	}
	if err != nil {
		os.Remove(a.tmp)
		return fmt.Errorf("writing %q: %w", a.path, err)
	}
	if d, err := os.Open(filepath.Dir(a.path)); err == nil {
		err = d.Sync()
		d.Close()
		if err != nil {
			return fmt.Errorf("syncing the folder of %q: %w", a.path, err)
		}
	}
	return nil
}

// abort removes the temporary file; the path is left as it was.
func (a *atomicFile) abort() error {
	if a.done {
		return nil
	}
	a.done = true
	a.f.Close()
	if err := os.Remove(a.tmp); err != nil {
		return fmt.Errorf("removing the partial output of %q: %w", a.path, err)
	}
	return nil
}
