package release

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/base64"
	"encoding/hex"
	"encoding/json"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"modelgate/internal/policy"
)

func jsonUnmarshal(t *testing.T, b []byte, v any) {
	t.Helper()
	if err := json.Unmarshal(b, v); err != nil {
		t.Fatal(err)
	}
}

func jsonMarshal(t *testing.T, v any) []byte {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// TestPAEVector checks the pre-authentication encoding against the DSSE
// protocol's test vector (secure-systems-lab/dsse, protocol.md, "Test
// Vectors").
func TestPAEVector(t *testing.T) {
	got := string(PAE("http://example.com/HelloWorld", []byte("hello world")))
	if want := "DSSEv1 29 http://example.com/HelloWorld 11 hello world"; got != want {
		t.Errorf("PAE = %q, want %q", got, want)
	}
}

func testStatement(t *testing.T) *Statement {
	st, err := newStatement("tiny-encoder", "sha256:"+strings.Repeat("ab", 32), PredicateApproval, map[string]string{"target": "tiny-encoder:prod"})
	if err != nil {
		t.Fatal(err)
	}
	return st
}

// captureStdout runs f and returns what it wrote to os.Stdout.
func captureStdout(t *testing.T, f func()) string {
	t.Helper()
	r, w, err := os.Pipe()
	if err != nil {
		t.Fatal(err)
	}
	old := os.Stdout
	os.Stdout = w
	done := make(chan string)
	go func() { b, _ := io.ReadAll(r); done <- string(b) }()
	f()
	os.Stdout = old
	w.Close()
	return <-done
}

// TestEnvelope: signatures verify with the right key only; payloadType,
// statement type and every base64 variant DSSE allows are handled; a
// signature repeated by one key is counted once and nothing reaches
// stdout.
func TestEnvelope(t *testing.T) {
	ctx := context.Background()
	ana, _ := GenerateKey("ana")
	ben, _ := GenerateKey("ben")
	raw, err := Sign(ctx, ana, testStatement(t))
	if err != nil {
		t.Fatal(err)
	}
	env, err := ParseEnvelope(raw)
	if err != nil {
		t.Fatal(err)
	}
	if got := env.VerifiedBy(ctx, []PublicKey{ben.Trusted(), ana.Trusted()}); len(got) != 1 || got[0].ID != ana.ID {
		t.Errorf("verified by %+v, want ana only", got)
	}
	if env.Statement.Type != StatementType || !env.Statement.About("sha256:"+strings.Repeat("ab", 32)) {
		t.Errorf("statement: %+v", env.Statement)
	}

	var m map[string]any
	jsonUnmarshal(t, raw, &m)
	payload, _ := base64.StdEncoding.DecodeString(m["payload"].(string))
	sig := m["signatures"].([]any)[0].(map[string]any)
	sigBytes, _ := base64.StdEncoding.DecodeString(sig["sig"].(string))
	variant := func(edit func(m map[string]any)) []byte {
		var c map[string]any
		jsonUnmarshal(t, raw, &c)
		edit(c)
		return jsonMarshal(t, c)
	}

	// Unpadded and URL-safe base64 (DSSE envelope.md allows both) verify.
	for name, enc := range map[string]*base64.Encoding{"raw std": base64.RawStdEncoding, "url": base64.URLEncoding, "raw url": base64.RawURLEncoding} {
		b := variant(func(c map[string]any) {
			c["payload"] = enc.EncodeToString(payload)
			c["signatures"].([]any)[0].(map[string]any)["sig"] = enc.EncodeToString(sigBytes)
		})
		e, err := ParseEnvelope(b)
		if err != nil || len(e.VerifiedBy(ctx, []PublicKey{ana.Trusted()})) != 1 {
			t.Errorf("%s base64: %v", name, err)
		}
	}
	// An edited payload does not verify.
	edited := variant(func(c map[string]any) {
		c["payload"] = base64.StdEncoding.EncodeToString(bytes.Replace(payload, []byte("prod"), []byte("dev!"), 1))
	})
	if e, err := ParseEnvelope(edited); err != nil || len(e.VerifiedBy(ctx, []PublicKey{ana.Trusted()})) != 0 {
		t.Errorf("edited payload verified (%v)", err)
	}
	// The library does not check payloadType; we do.
	if _, err := ParseEnvelope(variant(func(c map[string]any) { c["payloadType"] = "text/plain" })); err == nil || !strings.Contains(err.Error(), "payloadType") {
		t.Errorf("wrong payloadType: %v", err)
	}
	// A statement of another _type is refused.
	other := bytes.Replace(payload, []byte(StatementType), []byte("https://in-toto.io/Statement/v0.1"), 1)
	if _, err := ParseEnvelope(variant(func(c map[string]any) { c["payload"] = base64.StdEncoding.EncodeToString(other) })); err == nil {
		t.Error("a v0.1 statement was accepted")
	}
	// The same signature twice, and the same key listed twice: counted
	// once, and the library's message never reaches stdout.
	twice := variant(func(c map[string]any) { c["signatures"] = append(c["signatures"].([]any), sig) })
	out := captureStdout(t, func() {
		e, err := ParseEnvelope(twice)
		if err != nil {
			t.Error(err)
			return
		}
		if got := e.VerifiedBy(ctx, []PublicKey{ana.Trusted(), ana.Trusted()}); len(got) != 1 {
			t.Errorf("two signatures of one key verified as %d", len(got))
		}
	})
	if out != "" {
		t.Errorf("verification printed to stdout: %q", out)
	}
	// Unsigned envelopes verify with nobody.
	un, _ := Sign(ctx, nil, testStatement(t))
	if e, err := ParseEnvelope(un); err != nil || e.Signed() || len(e.VerifiedBy(ctx, []PublicKey{ana.Trusted()})) != 0 {
		t.Errorf("unsigned envelope: %v", err)
	}
}

// TestKeyFiles: key files round-trip, the private one is 0600, existing
// files are not overwritten, and the key id is the first 16 hex digits of
// the sha256 of the public key's DER, as openssl computes it.
func TestKeyFiles(t *testing.T) {
	dir := t.TempDir()
	k, err := GenerateKey("ana")
	if err != nil {
		t.Fatal(err)
	}
	priv, pub, err := WriteKeyFiles(filepath.Join(dir, "ana"), k)
	if err != nil {
		t.Fatal(err)
	}
	if fi, _ := os.Stat(priv); fi.Mode().Perm() != 0o600 {
		t.Errorf("private key mode %v, want 0600", fi.Mode().Perm())
	}
	back, err := LoadKey(priv)
	if err != nil || back.ID != k.ID || back.Name != "ana" || !bytes.Equal(back.Public, k.Public) {
		t.Fatalf("LoadKey: %+v, %v", back, err)
	}
	pk, err := LoadPublicKey(pub)
	if err != nil || pk.ID != k.ID || pk.Name != "ana" {
		t.Fatalf("LoadPublicKey: %+v, %v", pk, err)
	}
	if _, _, err := WriteKeyFiles(filepath.Join(dir, "ana"), k); err == nil {
		t.Error("overwrote an existing key")
	}
	if _, err := LoadKey(pub); err == nil || !strings.Contains(err.Error(), "public key") {
		t.Errorf("LoadKey of a public key: %v", err)
	}
	if strings.Contains(k.String(), "PRIVATE") {
		t.Error("String shows key material")
	}

	// Outside check: OpenSSL (Debian's openssl) reads both files and
	// computes the same DER, hence the same key id.
	openssl, err := exec.LookPath("openssl")
	if err != nil {
		if os.Getenv("CI") != "" {
			t.Fatal("openssl is missing on CI")
		}
		t.Skip("openssl not installed")
	}
	der, err := exec.Command(openssl, "pkey", "-pubin", "-in", pub, "-outform", "DER").Output()
	if err != nil {
		t.Fatalf("openssl pkey -pubin: %v", err)
	}
	sum := sha256.Sum256(der)
	h := hex.EncodeToString(sum[:])
	if h[:16] != k.ID {
		t.Errorf("openssl's DER hashes to %s…, key id %s", h[:16], k.ID)
	}
	pubFromPriv, err := exec.Command(openssl, "pkey", "-in", priv, "-pubout").Output()
	if err != nil {
		t.Fatalf("openssl pkey -in private: %v", err)
	}
	if got, err := policy.ParsePublicKey(pubFromPriv); err != nil || KeyID(got) != k.ID {
		t.Errorf("openssl's public key from our private key: %v", err)
	}
}
