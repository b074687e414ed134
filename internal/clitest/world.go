package clitest

import (
	"encoding/json"
	"encoding/pem"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
)

// World is a store with tiny encoder variants, keys and a policy for
// tiny-encoder:prod, driven through the built binary.
type World struct {
	T      *testing.T
	Store  string
	Dir    string
	Policy string
	IDs    map[string]string
}

// NameVariant writes the tiny encoder under another spec name: same
// weights and probes, another digest.
func NameVariant(t testing.TB, root string, i int) string {
	t.Helper()
	m := fixture.EncoderModel()
	m.Spec.Name = fmt.Sprintf("tiny-listener-encoder-%02d", i)
	dir := filepath.Join(root, m.Spec.Name)
	if err := modeldir.Write(dir, m); err != nil {
		t.Fatal(err)
	}
	return dir
}

// NewWorld is a World on a local store in a temporary directory whose
// policy requires required approvals.
func NewWorld(t *testing.T, required int) *World {
	t.Helper()
	return NewWorldAt(t, required, filepath.Join(t.TempDir(), "store"))
}

// NewWorldAt is NewWorld on the store at location store: keys for ana,
// ben, rita, ci and mallory, and a policy for tiny-encoder:prod that lists
// ana (by key id), ben and rita as approvers and ci as report signer.
func NewWorldAt(t *testing.T, required int, store string) *World {
	t.Helper()
	w := &World{T: t, Store: store, Dir: t.TempDir(), IDs: map[string]string{}}
	for _, n := range []string{"ana", "ben", "rita", "ci", "mallory"} {
		var out struct{ KeyID, PrivateKey string }
		r := MustMG(t, w.Store, "keygen", "--json", "--out", filepath.Join(w.Dir, n))
		if err := json.Unmarshal([]byte(r.Stdout), &out); err != nil || len(out.KeyID) != 16 {
			t.Fatalf("keygen --json: %v %q", err, r.Stdout)
		}
		w.IDs[n] = out.KeyID
		// The private key never reaches the output.
		b, _ := os.ReadFile(out.PrivateKey)
		blk, _ := pem.Decode(b)
		if blk == nil || strings.Contains(r.Stdout+r.Stderr, string(pem.EncodeToMemory(blk)[28:60])) {
			t.Fatalf("keygen printed key material or wrote no PEM")
		}
		if fi, _ := os.Stat(out.PrivateKey); fi.Mode().Perm() != 0o600 {
			t.Errorf("%s has mode %v", out.PrivateKey, fi.Mode().Perm())
		}
	}
	w.Policy = filepath.Join(w.Dir, "policy.yaml")
	text := fmt.Sprintf(`schemaVersion: 1
name: tiny-release
rules:
  - target: tiny-encoder:prod
    kind: encoder
    checks:
      holdout: {enabled: false}
      budget: {enabled: false}
    approvals:
      required: %d
      approvers:
        - {name: ana, keyFile: ana.pub.pem, keyId: "%s"}
        - {name: ben, keyFile: ben.pub.pem}
        - {name: rita, keyFile: rita.pub.pem}
      reportSigners:
        - {name: ci, keyFile: ci.pub.pem}
`, required, w.IDs["ana"])
	if err := os.WriteFile(w.Policy, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
	return w
}

// Key is the private key file of n.
func (w *World) Key(n string) string { return filepath.Join(w.Dir, n+".key.pem") }

// Push pushes variant i as tag (default tiny-encoder:v<i>) and returns its
// digest.
func (w *World) Push(i int, tag string) string {
	w.T.Helper()
	if tag == "" {
		tag = fmt.Sprintf("tiny-encoder:v%d", i)
	}
	return strings.TrimSpace(MustMG(w.T, w.Store, "push", NameVariant(w.T, w.Dir, i), tag).Stdout)
}

// Gate gates cand for tiny-encoder:prod, the report signed by ci.
func (w *World) Gate(cand string) {
	w.T.Helper()
	MustMG(w.T, w.Store, "gate", cand, "--to", "tiny-encoder:prod", "--policy", w.Policy, "--sign-key", w.Key("ci"))
}

// Approve runs approve of cand for tiny-encoder:prod with who's key.
func (w *World) Approve(cand, who string, args ...string) Result {
	return MG(w.T, w.Store, append([]string{"approve", cand, "--to", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key(who)}, args...)...)
}

// Promote runs promote of cand to tiny-encoder:prod.
func (w *World) Promote(cand string, args ...string) Result {
	return MG(w.T, w.Store, append([]string{"promote", cand, "--to", "tiny-encoder:prod", "--policy", w.Policy}, args...)...)
}

// Prod is the digest tiny-encoder:prod points at, "" without the tag.
func (w *World) Prod() string {
	w.T.Helper()
	return StoreTags(w.T, w.Store)["tiny-encoder:prod"]
}

// LsRow is one row of ls --json (the output-ls schema).
type LsRow struct {
	Repository string `json:"repository"`
	Tag        string `json:"tag"`
	Digest     string `json:"digest"`
	Kind       string `json:"kind"`
	Created    string `json:"created,omitempty"`
	Size       int64  `json:"size"`
}

// StoreTags maps every NAME:TAG of the store to its digest (ls --json).
func StoreTags(t testing.TB, store string) map[string]string {
	t.Helper()
	var rows []LsRow
	if err := json.Unmarshal([]byte(MustMG(t, store, "ls", "--json").Stdout), &rows); err != nil {
		t.Fatal(err)
	}
	out := map[string]string{}
	for _, r := range rows {
		out[r.Repository+":"+r.Tag] = r.Digest
	}
	return out
}

// MustVerify runs verify; it must exit 0 (hints allowed).
func MustVerify(t testing.TB, store, what string) {
	t.Helper()
	if r := MG(t, store, "verify", "--json"); r.Code != 0 {
		t.Fatalf("%s: verify exit %d\n%s%s", what, r.Code, r.Stdout, r.Stderr)
	}
}

// WantExit fails the test unless r exited with code and its output holds
// every fragment.
func WantExit(t testing.TB, r Result, code int, fragments ...string) {
	t.Helper()
	if r.Code != code {
		t.Errorf("exit %d, want %d\nstdout: %s\nstderr: %s", r.Code, code, r.Stdout, r.Stderr)
	}
	for _, f := range fragments {
		if !strings.Contains(r.Stdout+r.Stderr, f) {
			t.Errorf("output lacks %q\nstdout: %s\nstderr: %s", f, r.Stdout, r.Stderr)
		}
	}
}
