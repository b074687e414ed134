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
	"path/filepath"
	"regexp"
	"strings"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/policy"
)

// nameLinePrefix starts the line that key files of modelgate 0.1 carried
// before the PEM block to name the key's holder. Still read (a deprecated
// form: Key.NameLine says so), never written: a key file is plain
// PKCS#8 / SPKI PEM, and the holder's name lives in the policy.
const nameLinePrefix = "modelgate-key-name: "

// maxKeyFileBytes bounds a key file read.
const maxKeyFileBytes = 64 << 10

// keyNamePattern is what a key holder's name may be: printable, one line.
var keyNamePattern = regexp.MustCompile(`^[\p{L}\p{N} ._@+-]{1,128}$`)

// Key is an ed25519 signing key with its holder's name.
type Key struct {
	// Name is who holds the key: set by NameFrom from a policy's list,
	// else the name line of an old key file, else the key file's base
	// name without ".key.pem" ("" for a key from the environment or
	// standard input).
	Name string
	// NameLine is true when the key came from a file in the deprecated
	// form with a name line before the PEM block.
	NameLine bool
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

// NameFrom names k by the entry of keys (a policy's approvers, report
// signers, ...) that holds the same public key, if any, and returns k.
func (k *Key) NameFrom(keys []PublicKey) *Key {
	for _, t := range keys {
		if t.Public.Equal(k.Public) && t.Name != "" {
			k.Name = t.Name
			break
		}
	}
	return k
}

// PublicPEM returns the PKIX ("PUBLIC KEY") PEM encoding of the public
// key: standard PEM that openssl reads, nothing before or after it.
func (k *Key) PublicPEM() []byte {
	der, _ := x509.MarshalPKIXPublicKey(k.Public)
	return pem.EncodeToMemory(&pem.Block{Type: "PUBLIC KEY", Bytes: der})
}

// PrivatePEM returns the PKCS#8 ("PRIVATE KEY") PEM encoding of the
// private key, for a secret store. Handle with care.
func (k *Key) PrivatePEM() ([]byte, error) {
	der, err := x509.MarshalPKCS8PrivateKey(k.private)
	if err != nil {
		return nil, fmt.Errorf("encoding the private key: %w", err)
	}
	return pem.EncodeToMemory(&pem.Block{Type: "PRIVATE KEY", Bytes: der}), nil
}

// WriteKeyFiles writes k as PREFIX.key.pem (PKCS#8 PEM, mode 0600) and
// PREFIX.pub.pem (PKIX PEM, mode 0644), standard PEM without the holder's
// name (it goes in the policy), and returns the two paths. Existing files
// are never overwritten: if either exists nothing is written.
func WriteKeyFiles(prefix string, k *Key) (privPath, pubPath string, err error) {
	privPath, pubPath = prefix+".key.pem", prefix+".pub.pem"
	for _, p := range []string{privPath, pubPath} {
		if _, err := os.Lstat(p); err == nil {
			return "", "", errkind.New(errkind.BadInput, "%s exists: keygen never overwrites a key file", p)
		}
	}
	privPEM, err := k.PrivatePEM()
	if err != nil {
		return "", "", err
	}
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

// nameLine returns the holder's name from the text before the PEM block
// (the deprecated key file form).
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

// envVarPattern is what an environment variable named by env:VAR may be.
var envVarPattern = regexp.MustCompile(`^[A-Za-z_][A-Za-z0-9_]*$`)

// ReadKeySource reads a key named by src, one of
//
//	env:VAR    the value of environment variable VAR (the PEM text)
//	file:PATH  the file PATH
//	-          standard input (stdin)
//	PATH       the file PATH (anything else)
//
// and returns its bytes and, for a file, the file's path. Errors name the
// source, never its content. Every problem is errkind.BadInput.
func ReadKeySource(src string, stdin io.Reader) (b []byte, file string, err error) {
	switch {
	case src == "":
		return nil, "", errkind.New(errkind.BadInput, "reading key: no key given (env:VAR, file:PATH or - for standard input)")
	case src == "-":
		if stdin == nil {
			return nil, "", errkind.New(errkind.BadInput, "reading key from standard input: there is none")
		}
		b, err := io.ReadAll(io.LimitReader(stdin, maxKeyFileBytes+1))
		if err != nil {
			return nil, "", errkind.Wrap(errkind.BadInput, fmt.Errorf("reading key from standard input: %w", err))
		}
		if len(b) > maxKeyFileBytes {
			return nil, "", errkind.New(errkind.BadInput, "reading key: standard input holds more than %d bytes", maxKeyFileBytes)
		}
		if len(bytes.TrimSpace(b)) == 0 {
			return nil, "", errkind.New(errkind.BadInput, "reading key: standard input is empty")
		}
		return b, "", nil
	case strings.HasPrefix(src, "env:"):
		name := strings.TrimPrefix(src, "env:")
		if !envVarPattern.MatchString(name) {
			return nil, "", errkind.New(errkind.BadInput, "reading key: %q is not an environment variable name", name)
		}
		v, ok := os.LookupEnv(name)
		if !ok || strings.TrimSpace(v) == "" {
			return nil, "", errkind.New(errkind.BadInput, "reading key: environment variable %s is not set or empty", name)
		}
		if len(v) > maxKeyFileBytes {
			return nil, "", errkind.New(errkind.BadInput, "reading key: environment variable %s holds more than %d bytes", name, maxKeyFileBytes)
		}
		return []byte(v), "", nil
	}
	path := strings.TrimPrefix(src, "file:")
	b, err = readKeyFile(path)
	return b, path, err
}

// sourceLabel names a key source in messages.
func sourceLabel(src string) string {
	switch {
	case src == "-":
		return "key from standard input"
	case strings.HasPrefix(src, "env:"):
		return "key in environment variable " + strings.TrimPrefix(src, "env:")
	}
	return "key " + strings.TrimPrefix(src, "file:")
}

// baseName is a key file's name without its directory and ".key.pem",
// ".pub.pem" or ".pem".
func baseName(path string) string {
	n := filepath.Base(path)
	for _, suf := range []string{".key.pem", ".pub.pem", ".pem"} {
		if t, ok := strings.CutSuffix(n, suf); ok {
			n = t
			break
		}
	}
	if !keyNamePattern.MatchString(n) {
		return ""
	}
	return n
}

// LoadKey reads a private key (see LoadKeyFrom), "-" from os.Stdin.
func LoadKey(src string) (*Key, error) { return LoadKeyFrom(src, os.Stdin) }

// LoadKeyFrom reads a private key from src (env:VAR, file:PATH, - for
// stdin, or a path; see ReadKeySource): a PKCS#8 PEM "PRIVATE KEY" block
// holding an ed25519 key, as keygen and `openssl genpkey -algorithm
// ed25519` write it. The deprecated form with a name line before the
// block is still read (Key.NameLine). Errors never include key material.
func LoadKeyFrom(src string, stdin io.Reader) (*Key, error) {
	b, file, err := ReadKeySource(src, stdin)
	if err != nil {
		return nil, err
	}
	k, err := ParseKey(b)
	if err != nil {
		return nil, errkind.Wrap(errkind.BadInput, fmt.Errorf("%s: %w", sourceLabel(src), err))
	}
	if k.Name == "" && file != "" {
		k.Name = baseName(file)
	}
	return k, nil
}

// ParseKey parses the bytes of a private key (see LoadKeyFrom).
func ParseKey(b []byte) (*Key, error) {
	block, rest := pem.Decode(b)
	if block == nil {
		return nil, errors.New("no PEM block found: want a PKCS#8 \"PRIVATE KEY\" block")
	}
	if len(bytes.TrimSpace(rest)) > 0 {
		return nil, errors.New("text after the PEM block: want exactly one \"PRIVATE KEY\" block")
	}
	if block.Type == "PUBLIC KEY" {
		return nil, errors.New("this is a public key: signing needs the private key (*.key.pem)")
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
	name := nameLine(b)
	return &Key{Name: name, NameLine: name != "", ID: KeyID(pub), Public: pub, private: priv}, nil
}

// LoadPublicKey reads a public key (PKIX PEM, ed25519) from src (see
// ReadKeySource; "-" is os.Stdin). Its name is the deprecated name line's,
// else the file's base name.
func LoadPublicKey(src string) (PublicKey, error) {
	b, file, err := ReadKeySource(src, os.Stdin)
	if err != nil {
		return PublicKey{}, err
	}
	pub, err := policy.ParsePublicKey(b)
	if err != nil {
		return PublicKey{}, errkind.Wrap(errkind.BadInput, fmt.Errorf("public %s: %w", sourceLabel(src), err))
	}
	name := nameLine(b)
	if name == "" && file != "" {
		name = baseName(file)
	}
	return PublicKey{Name: name, ID: KeyID(pub), Public: pub}, nil
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
