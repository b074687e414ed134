//go:build !unix

package modeldir

import "os"

func mapFile(path string) ([]byte, bool, error) {
	b, err := os.ReadFile(path)
	return b, false, err
}

func unmap([]byte) error { return nil }
