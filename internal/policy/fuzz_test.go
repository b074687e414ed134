package policy

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"os"
	"testing"

	"github.com/modelgate/modelgate/internal/errkind"
)

// FuzzParse: Parse never panics; it either returns a policy whose digest
// is the sha256 of the input and which has a rule for each of its targets,
// or a bad-input error (never an internal one).
func FuzzParse(f *testing.F) {
	for _, p := range examples {
		raw, err := os.ReadFile(p)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(raw, false)
	}
	f.Add([]byte(minimalScorer), false)
	f.Add([]byte(minimalEncoder), false)
	f.Add([]byte(`{"schemaVersion": 1, "name": "x", "rules": [{"target": "a:b", "kind": "encoder", "holdout": "h@sha256:`+
		"0000000000000000000000000000000000000000000000000000000000000000"+`"}]}`), true)
	f.Add([]byte(`{"schemaVersion": 1, "rules": [{"kind": "scorer", "kind": "scorer"}]} x`), true)
	f.Add([]byte("a: [1\n"), false)
	f.Add([]byte(minimalScorer+"    checks: {holdout: {margin: 1e400, seed: 1.5}}\n"), false)
	f.Fuzz(func(t *testing.T, raw []byte, asJSON bool) {
		name := "fuzz.yaml"
		if asJSON {
			name = "fuzz.json"
		}
		p, err := Parse(name, raw)
		if err != nil {
			if !errkind.Is(err, errkind.BadInput) {
				t.Fatalf("error of kind %v: %v", errkind.Of(err), err)
			}
			return
		}
		sum := sha256.Sum256(raw)
		if p.FileDigest() != "sha256:"+hex.EncodeToString(sum[:]) {
			t.Fatalf("file digest %s", p.FileDigest())
		}
		// The canonical form reads back to the same rules and digest.
		c, err := Parse("canonical.json", p.Canonical())
		if err != nil {
			t.Fatalf("the canonical form does not parse: %v\n%s", err, p.Canonical())
		}
		if c.Digest() != p.Digest() || !bytes.Equal(c.Canonical(), p.Canonical()) {
			t.Fatalf("the canonical form is not a fixed point:\n%s\n%s", p.Canonical(), c.Canonical())
		}
		if len(p.Rules) == 0 {
			t.Fatal("a policy without rules")
		}
		for _, target := range p.Targets() {
			r, err := p.Rule(target)
			if err != nil || r.Target.String() != target || !r.Integrity.Enabled {
				t.Fatalf("Rule(%q): %v %+v", target, err, r)
			}
		}
	})
}
