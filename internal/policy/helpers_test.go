package policy

import (
	"crypto/ed25519"
	"crypto/sha256"
	"crypto/x509"
	"encoding/pem"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// testKey returns a deterministic ed25519 key pair and its public key as
// PEM, from a one-byte seed.
func testKey(t testing.TB, seed byte) (ed25519.PublicKey, string) {
	t.Helper()
	s := sha256.Sum256([]byte{seed})
	priv := ed25519.NewKeyFromSeed(s[:])
	pub := priv.Public().(ed25519.PublicKey)
	der, err := x509.MarshalPKIXPublicKey(pub)
	if err != nil {
		t.Fatal(err)
	}
	return pub, string(pem.EncodeToMemory(&pem.Block{Type: "PUBLIC KEY", Bytes: der}))
}

// indent prefixes every line of s but the first with n spaces (to put a
// PEM block in a YAML block scalar).
func indent(s string, n int) string {
	pad := strings.Repeat(" ", n)
	lines := strings.Split(strings.TrimRight(s, "\n"), "\n")
	return strings.Join(lines, "\n"+pad)
}

// writeFile writes content to dir/name, creating folders, and returns the
// path.
func writeFile(t testing.TB, dir, name, content string) string {
	t.Helper()
	p := filepath.Join(dir, filepath.FromSlash(name))
	if err := os.MkdirAll(filepath.Dir(p), 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(p, []byte(content), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

// minimalScorer is the smallest valid scorer policy.
const minimalScorer = `schemaVersion: 1
name: tiny
rules:
  - target: promo-scorer:prod
    kind: scorer
    holdout: promo-holdout:v1
`

// minimalEncoder is the smallest valid encoder policy.
const minimalEncoder = `schemaVersion: 1
name: tiny-encoder
rules:
  - target: listener-encoder:prod
    kind: encoder
    holdout: listener-holdout:v1
`
