package fileio

import (
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"strings"
)

// ErrNotRegular is wrapped by OpenRegular's error for a path that names
// something other than a regular file: a named pipe, a device, a socket or
// a directory.
var ErrNotRegular = errors.New("not a regular file")

// OpenRegular opens path for reading only if it is a regular file (after
// following symbolic links). The open itself does not block: a named pipe
// with no writer would otherwise hold open(2), and the process, until
// another process opened it for writing. The returned FileInfo is the
// open file's own (fstat), not the path's.
func OpenRegular(path string) (*os.File, fs.FileInfo, error) {
	f, err := os.OpenFile(path, os.O_RDONLY|oNonblock, 0)
	if err != nil {
		return nil, nil, err
	}
	fi, err := f.Stat()
	if err != nil {
		f.Close()
		return nil, nil, err
	}
	if !fi.Mode().IsRegular() {
		f.Close()
		return nil, nil, fmt.Errorf("%s: %w (%s)", path, ErrNotRegular, describeMode(fi.Mode()))
	}
	return f, fi, nil
}

// ReadRegular reads the regular file at path (see OpenRegular), refusing
// one larger than limit bytes.
func ReadRegular(path string, limit int64) ([]byte, error) {
	f, _, err := OpenRegular(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, limit+1))
	if err != nil {
		return nil, err
	}
	if int64(len(b)) > limit {
		return nil, fmt.Errorf("larger than %d bytes", limit)
	}
	return b, nil
}

// describeMode names a file type for messages.
func describeMode(m fs.FileMode) string {
	switch {
	case m&fs.ModeNamedPipe != 0:
		return "a named pipe"
	case m&fs.ModeSocket != 0:
		return "a socket"
	case m&fs.ModeCharDevice != 0:
		return "a character device"
	case m&fs.ModeDevice != 0:
		return "a device"
	case m.IsDir():
		return "a directory"
	}
	return "file type " + m.Type().String()
}

// ErrOutside is wrapped by OpenInDir's error for a name that is a symbolic
// link leading outside the directory.
var ErrOutside = errors.New("a symbolic link leading outside the directory")

// OpenInDir opens the regular file name inside dir for reading (see
// OpenRegular). name may be a symbolic link only when it resolves to a
// file inside dir (dir's own links resolved first); a link that leads out
// of dir is refused, so what is read is what the directory holds.
func OpenInDir(dir, name string) (*os.File, fs.FileInfo, error) {
	path := filepath.Join(dir, name)
	lfi, err := os.Lstat(path)
	if err != nil {
		return nil, nil, err
	}
	if lfi.Mode()&fs.ModeSymlink == 0 {
		f, fi, err := OpenRegular(path)
		if err == nil && !os.SameFile(lfi, fi) {
			// Replaced by a link (or another file) between the two looks.
			f.Close()
			return nil, nil, fmt.Errorf("%s changed while it was opened", path)
		}
		return f, fi, err
	}
	realDir, err := filepath.EvalSymlinks(dir)
	if err != nil {
		return nil, nil, err
	}
	target, err := filepath.EvalSymlinks(path)
	if err != nil {
		return nil, nil, err
	}
	rel, err := filepath.Rel(realDir, target)
	if err != nil || rel == ".." || strings.HasPrefix(rel, ".."+string(filepath.Separator)) || filepath.IsAbs(rel) {
		return nil, nil, fmt.Errorf("%s: %w (it points at %s)", path, ErrOutside, target)
	}
	f, fi, err := OpenRegular(target)
	if err != nil {
		return nil, nil, err
	}
	if tfi, err := os.Stat(path); err != nil || !os.SameFile(tfi, fi) {
		f.Close()
		return nil, nil, fmt.Errorf("%s changed while it was opened", path)
	}
	return f, fi, nil
}

// ReadInDir reads the regular file name inside dir (see OpenInDir),
// refusing one larger than limit bytes.
func ReadInDir(dir, name string, limit int64) ([]byte, error) {
	f, _, err := OpenInDir(dir, name)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, limit+1))
	if err != nil {
		return nil, err
	}
	if int64(len(b)) > limit {
		return nil, fmt.Errorf("larger than %d bytes", limit)
	}
	return b, nil
}
