package stats

import (
	"go/build"
	"strings"
	"testing"
)

// TestImports keeps the package pure statistics: the standard library,
// gonum and errkind, nothing of the model, runtime or stores.
func TestImports(t *testing.T) {
	pkg, err := build.ImportDir(".", 0)
	if err != nil {
		t.Fatal(err)
	}
	for _, imp := range pkg.Imports {
		std := !strings.Contains(strings.Split(imp, "/")[0], ".") && !strings.HasPrefix(imp, "github.com/modelgate/modelgate/")
		if std || strings.HasPrefix(imp, "gonum.org/v1/gonum/") || imp == "github.com/modelgate/modelgate/internal/errkind" {
			continue
		}
		t.Errorf("stats imports %s", imp)
	}
}
