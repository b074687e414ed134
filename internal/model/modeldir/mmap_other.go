//go:build !unix

package modeldir

func mapFile(dir, name string) ([]byte, bool, error) {
	b, err := readLimited(dir, name, maxTensorFile)
	return b, false, err
}

func unmap([]byte) error { return nil }
