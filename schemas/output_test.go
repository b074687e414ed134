package schemas_test

import (
	"testing"

	"github.com/modelgate/modelgate/schemas"
)

// TestOutputSchemasCompile: every command's output schema compiles (with
// its references to the error and report schemas), and the error document
// shape is what it promises.
func TestOutputSchemasCompile(t *testing.T) {
	for _, c := range schemas.OutputCommands {
		if _, err := schemas.Validate(schemas.Output(c), []byte(`{"error":{"exitCode":2,"kind":"bad-input","message":"no such file"}}`)); err != nil {
			t.Errorf("%s: %v", c, err)
		}
	}
	for doc, want := range map[string]bool{
		`{"error":{"exitCode":2,"kind":"bad-input","message":"no such file"}}`: true,
		`{"error":{"exitCode":2,"kind":"bad-input"}}`:                          false,
		`{"error":"no such file"}`:                                             false,
		`{"error":{"exitCode":6,"kind":"bad-input","message":"x"}}`:            false,
	} {
		vs, err := schemas.Validate(schemas.Output("push"), []byte(doc))
		if err != nil {
			t.Fatal(err)
		}
		if (len(vs) == 0) != want {
			t.Errorf("push output %s: violations %v, want valid=%v", doc, vs, want)
		}
	}
}
