package policy

import (
	"bytes"
	"crypto/ed25519"
	"crypto/x509"
	"encoding/pem"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
)

// maxKeyFileBytes bounds a key file; a PEM ed25519 public key is ~113 bytes.
const maxKeyFileBytes = 64 << 10

// buildKeys parses the keys of one list (approvers or report signers),
// labelling problems with the key's pointer and its holder's name.
func buildKeys(policyName, at, role string, ws []wireKey, probs *Problems, o loadOptions) []Key {
	var out []Key
	names := map[string]int{}
	ids := map[string]int{}
	keys := map[string]int{}
	for i, w := range ws {
		kp := fmt.Sprintf("%s/%d", at, i)
		who := fmt.Sprintf("%s %q", role, w.Name)
		if j, dup := names[w.Name]; dup {
			probs.add(kp+"/name", "%s is listed twice (also %s/%d)", who, at, j)
		} else {
			names[w.Name] = i
		}
		if w.KeyID != "" {
			if j, dup := ids[w.KeyID]; dup {
				probs.add(kp+"/keyId", "%s: key id %q is already used by %s/%d", who, w.KeyID, at, j)
			} else {
				ids[w.KeyID] = i
			}
		}
		k := Key{Name: w.Name, KeyID: w.KeyID, KeyFile: w.KeyFile}
		var pemText []byte
		field := "/publicKey"
		if w.KeyFile != "" && o.skipKeyFiles {
			// Left unread: the caller needs no keys (a shard of a gate).
			out = append(out, k)
			continue
		}
		if w.KeyFile != "" {
			field = "/keyFile"
			b, err := readKeyFile(policyName, w.KeyFile)
			if err != nil {
				probs.add(kp+field, "%s: %v", who, err)
				continue
			}
			pemText = b
		} else {
			pemText = []byte(w.PublicKey)
		}
		pub, err := ParsePublicKey(pemText)
		if err != nil {
			probs.add(kp+field, "%s: %v", who, err)
			continue
		}
		if j, dup := keys[string(pub)]; dup {
			probs.add(kp+field, "%s has the same public key as %s/%d: each key counts once", who, at, j)
			continue
		}
		keys[string(pub)] = i
		k.PublicKey = pub
		out = append(out, k)
	}
	return out
}

// readKeyFile reads the key a keyFile names: env:VAR (the PEM text in
// environment variable VAR), file:PATH or PATH (a file, relative to the
// policy file's directory).
func readKeyFile(policyName, keyFile string) ([]byte, error) {
	if name, ok := strings.CutPrefix(keyFile, "env:"); ok {
		v := os.Getenv(name)
		if name == "" || strings.TrimSpace(v) == "" {
			return nil, fmt.Errorf("reading key: environment variable %q is not set or empty", name)
		}
		if len(v) > maxKeyFileBytes {
			return nil, fmt.Errorf("reading key: environment variable %s holds more than %d bytes", name, maxKeyFileBytes)
		}
		return []byte(v), nil
	}
	if keyFile == "-" {
		return nil, errors.New("a policy cannot read a key from standard input: put the key inline (publicKey), in a file or in env:VAR")
	}
	p := strings.TrimPrefix(keyFile, "file:")
	if !filepath.IsAbs(p) {
		p = filepath.Join(filepath.Dir(policyName), filepath.FromSlash(p))
	}
	if err := regularFile(p); err != nil {
		return nil, fmt.Errorf("reading key file: %w", err)
	}
	f, err := os.Open(p)
	if err != nil {
		return nil, fmt.Errorf("reading key file: %w", err)
	}
	defer f.Close()
	b, err := io.ReadAll(io.LimitReader(f, maxKeyFileBytes+1))
	if err != nil {
		return nil, fmt.Errorf("reading key file %s: %w", p, err)
	}
	if len(b) > maxKeyFileBytes {
		return nil, fmt.Errorf("key file %s is larger than %d bytes", p, maxKeyFileBytes)
	}
	return b, nil
}

// ParsePublicKey parses one PEM "PUBLIC KEY" block (PKIX) holding an
// ed25519 key. Anything else — no PEM, several blocks, a private key,
// another algorithm — is an error that says which.
func ParsePublicKey(pemText []byte) (ed25519.PublicKey, error) {
	block, rest := pem.Decode(pemText)
	if block == nil {
		return nil, errors.New("no PEM block found: want a PEM \"PUBLIC KEY\" block")
	}
	if len(bytes.TrimSpace(rest)) > 0 {
		return nil, errors.New("more than one PEM block, or text after the PEM block: want exactly one \"PUBLIC KEY\" block")
	}
	if strings.Contains(block.Type, "PRIVATE") {
		return nil, fmt.Errorf("this is a %s: a policy holds public keys only; keep the private key secret and give its public key here", block.Type)
	}
	if block.Type != "PUBLIC KEY" {
		return nil, fmt.Errorf("PEM block type is %q, want \"PUBLIC KEY\"", block.Type)
	}
	k, err := x509.ParsePKIXPublicKey(block.Bytes)
	if err != nil {
		return nil, fmt.Errorf("parsing public key: %w", err)
	}
	pub, ok := k.(ed25519.PublicKey)
	if !ok {
		return nil, fmt.Errorf("the key is %s, want ed25519", keyType(k))
	}
	return pub, nil
}

func keyType(k any) string {
	s := fmt.Sprintf("%T", k)
	s = strings.TrimPrefix(s, "*")
	return strings.TrimSuffix(s, ".PublicKey")
}

// regularFile refuses what is not a regular file before it is opened (a
// FIFO would block the open).
func regularFile(p string) error {
	fi, err := os.Stat(p)
	if err != nil {
		return err
	}
	if !fi.Mode().IsRegular() {
		return fmt.Errorf("%s is not a regular file", p)
	}
	return nil
}
