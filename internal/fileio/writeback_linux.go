package fileio

import (
	"os"

	"golang.org/x/sys/unix"
)

func startWriteback(f *os.File, off, n int64) {
	_ = unix.SyncFileRange(int(f.Fd()), off, n, unix.SYNC_FILE_RANGE_WRITE)
}
