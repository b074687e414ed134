//go:build unix

package modeldir

import (
	"os"

	"golang.org/x/sys/unix"
)

// mmapMin is the size from which tensor files are mapped, not read.
const mmapMin = 1 << 20

// mapFile maps a file read-only, or reads it when it is small; mapped
// says which.
func mapFile(path string) (b []byte, mapped bool, err error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, false, err
	}
	defer f.Close()
	st, err := f.Stat()
	if err != nil {
		return nil, false, err
	}
	if !st.Mode().IsRegular() || st.Size() < mmapMin || st.Size() != int64(int(st.Size())) {
		b, err := os.ReadFile(path)
		return b, false, err
	}
	b, err = unix.Mmap(int(f.Fd()), 0, int(st.Size()), unix.PROT_READ, unix.MAP_SHARED)
	if err != nil {
		b, err := os.ReadFile(path)
		return b, false, err
	}
	return b, true, nil
}

func unmap(b []byte) error { return unix.Munmap(b) }
