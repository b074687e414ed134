package main

import (
	"crypto/sha256"
	"encoding/hex"
	"testing"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

func sha256Hex(b []byte) string {
	s := sha256.Sum256(b)
	return hex.EncodeToString(s[:])
}

func manifestDigest(t *testing.T, d *modeldir.Dir) string {
	t.Helper()
	_, h, err := artifact.ModelManifest(d)
	if err != nil {
		t.Fatal(err)
	}
	return h.String()
}
