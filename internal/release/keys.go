package release

import (
	"bufio"
	"bytes"
	"crypto/ed25519"
	"crypto/rand"
	"crypto/sha256"
	"crypto/x509"
	"encoding/hex"
	"encoding/pem"
	"errors"
	"fmt"
	"io"
	"os"
	"regexp"
	"strings"

	"modelgate/internal/errkind"
	"modelgate/internal/policy"
)

// nameLinePrefix starts the optional line before a key file's PEM block
// that names the key's holder. PEM readers (Go's encoding/pem, OpenSSL)
// skip text before the block.
const nameLinePrefix = "modelgate-key-name: "

// maxKeyFileBytes bounds a key file read.
const maxKeyFileBytes = 64 << 10

// keyNamePattern is what a key holder's name may be: printable, one line.
var keyNamePattern = regexp.MustCompile(`^[\p{L}\p{N} ._@+-]{1,128}$`)

// Key is an ed25519 signing key with its holder's name.
type Key struct {
	// Name is who holds the key ("" when the file names nobody).
	Name string
	// ID is KeyID(Public).
	ID      string
	Public  ed25519.PublicKey
	private ed25519.PrivateKey
}

// PublicKey is a trusted public key: who holds it and the key.
type PublicKey struct {
	Name   string
	ID     string
	Public ed25519.PublicKey
}

// KeyID returns the id of an ed25519 public key: the first 16 hex digits
// of the sha256 of its PKIX DER encoding.
func KeyID(pub ed25519.PublicKey) string {
	der, err := x509.MarshalPKIXPublicKey(pub)
	if err != nil { // only for a key of the wrong length
		return ""
	}
	sum := sha256.Sum256(der)
	return hex.EncodeToString(sum[:])[:16]
}

// GenerateKey makes a new ed25519 key for name, from crypto/rand.
func GenerateKey(name string) (*Key, error) {
	if name != "" && !keyNamePattern.MatchString(name) {
		return nil, errkind.New(errkind.BadInput, "key name %q: use 1 to 128 letters, digits, spaces and . _ @ + -", name)
	}
	pub, priv, err := ed25519.GenerateKey(rand.Reader)
	if err != nil {
		return nil, fmt.Errorf("generating an ed25519 key: %w", err)
	}
	return &Key{Name: name, ID: KeyID(pub), Public: pub, private: priv}, nil
}

// Trusted returns the public half of k.
func (k *Key) Trusted() PublicKey { return PublicKey{Name: k.Name, ID: k.ID, Public: k.Public} }

// String names the key by holder and id; it never shows key material.
func (k *Key) String() string {
	if k.Name == "" {
		return k.ID
	}
	return k.Name + " (" + k.ID + ")"
}

// PublicPEM returns the PKIX PEM encoding of the public key, preceded by
// the name line when the key has a name.
func (k *Key) PublicPEM() []byte {
	der, _ := x509.MarshalPKIXPublicKey(k.Public)
	return withNameLine(k.Name, pem.EncodeToMemory(&pem.Block{Type: "PUBLIC KEY", Bytes: der}))
}

func withNameLine(name string, pemText []byte) []byte {
	if name == "" {
		return pemText
	}
	return append([]byte(nameLinePrefix+name+"\n"), pemText...)
}

// WriteKeyFiles writes k as PREFIX.key.pem (PKCS#8 PEM, mode 0600) and
// PREFIX.pub.pem (PKIX PEM, mode 0644) and returns the two paths. Existing
// files are never overwritten: if either exists nothing is written.
func WriteKeyFiles(prefix string, k *Key) (privPath, pubPath string, err error) {
	privPath, pubPath = prefix+".key.pem", prefix+".pub.pem"
	for _, p := range []string{privPath, pubPath} {
		if _, err := os.Lstat(p); err == nil {
			return "", "", errkind.New(errkind.BadInput, "%s exists: keygen never overwrites a key file", p)
		}
	}
	der, err := x509.MarshalPKCS8PrivateKey(k.private)
	if err != nil {
		return "", "", fmt.Errorf("encoding the private key: %w", err)
	}
	privPEM := withNameLine(k.Name, pem.EncodeToMemory(&pem.Block{Type: "PRIVATE KEY", Bytes: der}))
	if err := writeNew(privPath, privPEM, 0o600); err != nil {
		return "", "", err
	}
	if err := writeNew(pubPath, k.PublicPEM(), 0o644); err != nil {
		os.Remove(privPath)
		return "", "", err
	}
	return privPath, pubPath, nil
}

// writeNew creates path exclusively with mode perm and writes b, synced.
func writeNew(path string, b []byte, perm os.FileMode) error {
	f, err := os.OpenFile(path, os.O_WRONLY|os.O_CREATE|os.O_EXCL, perm)
	if err != nil {
		return errkind.Wrap(errkind.BadInput, fmt.Errorf("writing key file: %w", err))
	}
	if err := f.Chmod(perm); err == nil { // umask may have narrowed it; never widen 0600
		_, err = f.Write(b)
		if err == nil {
			err = f.Sync()
		}
		if cerr := f.Close(); err == nil {
			err = cerr
		}
		if err == nil {
			return nil
		}
	} else {
		f.Close()
	}
	os.Remove(path)
	return fmt.Errorf("writing key file %s: %w", path, err)
}

func readKeyFile(path string) ([]byte, error) {
	fi, err := os.Stat(path)
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("reading key: %w", err))
	}
	if !fi.Mode().IsRegular() {
		return nil, errkind.New(errkind.BadInput, "reading key: %s is not a regular file", path)
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("reading key: %w", err))
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, maxKeyFileBytes+1))
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("reading key %s: %w", path, err))
	}
	if len(b) > maxKeyFileBytes {
		return nil, errkind.New(errkind.BadInput, "reading key: %s is larger than %d bytes", path, maxKeyFileBytes)
	}
	return b, nil
}

// nameLine returns the holder's name from the text before the PEM block.
func nameLine(b []byte) string {
	before, _, _ := bytes.Cut(b, []byte("-----BEGIN"))
	sc := bufio.NewScanner(bytes.NewReader(before))
	for sc.Scan() {
		if n, ok := strings.CutPrefix(strings.TrimSpace(sc.Text()), nameLinePrefix); ok && keyNamePattern.MatchString(n) {
			return n
		}
	}
	return ""
}

// LoadKey reads a private key file written by WriteKeyFiles (or any
// PKCS#8 PEM "PRIVATE KEY" holding an ed25519 key). Errors never include
// key material.
func LoadKey(path string) (*Key, error) {
	b, err := readKeyFile(path)
	if err != nil {
		return nil, err
	}
	k, err := ParseKey(b)
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("key %s: %w", path, err))
	}
	return k, nil
}

// ParseKey parses the bytes of a private key file (see LoadKey).
func ParseKey(b []byte) (*Key, error) {
	block, rest := pem.Decode(b)
	if block == nil {
		return nil, errors.New("no PEM block found: want a PKCS#8 \"PRIVATE KEY\" block")
	}
	if len(bytes.TrimSpace(rest)) > 0 {
		return nil, errors.New("text after the PEM block: want exactly one \"PRIVATE KEY\" block")
	}
	if block.Type == "PUBLIC KEY" {
		return nil, errors.New("this is a public key: signing needs the private key file (*.key.pem)")
	}
	if block.Type != "PRIVATE KEY" {
		return nil, fmt.Errorf("PEM block type is %q, want PKCS#8 \"PRIVATE KEY\"", block.Type)
	}
	if len(block.Headers) > 0 {
		return nil, errors.New("the PEM block has headers (an encrypted key?): want an unencrypted PKCS#8 key")
	}
	k, err := x509.ParsePKCS8PrivateKey(block.Bytes)
	if err != nil {
		return nil, errors.New("the PEM block is not a valid PKCS#8 private key")
	}
	priv, ok := k.(ed25519.PrivateKey)
	if !ok {
		return nil, fmt.Errorf("the key is %T, want ed25519", k)
	}
	pub := priv.Public().(ed25519.PublicKey)
	return &Key{Name: nameLine(b), ID: KeyID(pub), Public: pub, private: priv}, nil
}

// LoadPublicKey reads a public key file (PKIX PEM, ed25519) and the name
// on its name line, if any.
func LoadPublicKey(path string) (PublicKey, error) {
	b, err := readKeyFile(path)
	if err != nil {
		return PublicKey{}, err
	}
	pub, err := policy.ParsePublicKey(b)
	if err != nil {
		return PublicKey{}, errkind.Wrap(errkind.BadInput, fmt.Errorf("public key %s: %w", path, err))
	}
	return PublicKey{Name: nameLine(b), ID: KeyID(pub), Public: pub}, nil
}

// TrustedKeys converts a policy's key list. A key whose keyId in the
// policy differs from KeyID of its key is an errkind.BadInput error, so a
// policy cannot name one key and mean another.
func TrustedKeys(keys []policy.Key) ([]PublicKey, error) {
	out := make([]PublicKey, 0, len(keys))
	for _, k := range keys {
		id := KeyID(k.PublicKey)
		if k.KeyID != "" && k.KeyID != id {
			return nil, errkind.New(errkind.BadInput, "policy key of %q says keyId %q but the key's id is %s", k.Name, k.KeyID, id)
		}
		out = append(out, PublicKey{Name: k.Name, ID: id, Public: k.PublicKey})
	}
	return out, nil
}
