package modeldir

import (
	"encoding/json"
	"os"
	"path/filepath"
	"testing"
)

// FuzzParseSpec: the spec parser (schema validation, then the cross-field
// rules) never panics, and a spec it accepts re-encodes to a spec it
// accepts again.
func FuzzParseSpec(f *testing.F) {
	for _, m := range []string{"tiny-encoder", "tiny-scorer"} {
		if b, err := os.ReadFile(filepath.Join("..", "..", "..", "testdata", "models", m, SpecFile)); err == nil {
			f.Add(b)
		}
	}
	f.Add([]byte(`{}`))
	f.Add([]byte(`{"schemaVersion":1,"kind":"encoder"}`))
	f.Add([]byte(`[`))
	f.Fuzz(func(t *testing.T, raw []byte) {
		s, problems, err := ParseSpec(raw)
		if err != nil || s == nil || len(problems) > 0 {
			return
		}
		again, err := json.Marshal(s)
		if err != nil {
			t.Fatal(err)
		}
		if s2, p2, err := ParseSpec(again); err != nil || s2 == nil || len(p2) > 0 {
			t.Fatalf("accepted spec re-encodes to one refused: %v %v\n%s", err, p2, again)
		}
	})
}
