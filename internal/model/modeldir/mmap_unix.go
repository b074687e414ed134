//go:build unix

package modeldir

import (
	"io"

	"golang.org/x/sys/unix"

	"github.com/modelgate/modelgate/internal/fileio"
)

// mmapMin is the size from which tensor files are mapped, not read.
const mmapMin = 1 << 20

// mapFile maps a file read-only, or reads it when it is small; mapped
// says which.
// The file is name inside the model directory dir (see fileio.OpenInDir).
func mapFile(dir, name string) (b []byte, mapped bool, err error) {
	f, st, err := fileio.OpenInDir(dir, name)
	if err != nil {
		return nil, false, err
	}
	defer f.Close()
	if st.Size() < mmapMin || st.Size() != int64(int(st.Size())) {
		b, err := io.ReadAll(f)
		return b, false, err
	}
	b, err = unix.Mmap(int(f.Fd()), 0, int(st.Size()), unix.PROT_READ, unix.MAP_SHARED)
	if err != nil {
		b, err := io.ReadAll(f)
		return b, false, err
	}
	return b, true, nil
}

func unmap(b []byte) error { return unix.Munmap(b) }
