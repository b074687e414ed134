//go:build unix

package fileio

import "syscall"

const oNonblock = syscall.O_NONBLOCK
