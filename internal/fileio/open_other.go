//go:build !unix

package fileio

const oNonblock = 0
