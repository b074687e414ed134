package freeze_test

import (
	"go/build"
	"strings"
	"testing"
)

// TestFreezeImports keeps the package's dependencies pointing inward: the gate's
// checks call freeze.Verify, so freeze must not import them, nor any CLI
// or cloud library.
func TestFreezeImports(t *testing.T) {
	p, err := build.Default.ImportDir(".", 0)
	if err != nil {
		t.Fatal(err)
	}
	for _, imp := range p.Imports {
		switch {
		case imp == "github.com/modelgate/modelgate/internal/checks", strings.HasPrefix(imp, "github.com/modelgate/modelgate/internal/release"),
			strings.HasPrefix(imp, "github.com/modelgate/modelgate/internal/report"), strings.HasPrefix(imp, "github.com/modelgate/modelgate/cmd"),
			strings.HasPrefix(imp, "github.com/spf13/"), strings.HasPrefix(imp, "cloud.google.com/"):
			t.Errorf("internal/freeze imports %s", imp)
		}
	}
	if len(p.Imports) == 0 {
		t.Fatal("no imports found: wrong directory?")
	}
}
