package web

import (
	"go/build"
	"strings"
	"testing"
)

// TestServeImports keeps the view's dependencies pointing inward and its
// attack surface small: no CLI or cloud library, no browser driver outside
// tests, and no package that writes to a store on its own (the view reads
// through registry.Store, and release and checks only for what they read).
func TestServeImports(t *testing.T) {
	p, err := build.Default.ImportDir(".", 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(p.Imports) == 0 {
		t.Fatal("no imports found: wrong directory?")
	}
	for _, imp := range p.Imports {
		switch {
		case strings.HasPrefix(imp, "github.com/modelgate/modelgate/cmd"), strings.HasPrefix(imp, "github.com/spf13/"),
			strings.HasPrefix(imp, "cloud.google.com/"), strings.HasPrefix(imp, "github.com/chromedp/"),
			imp == "text/template", imp == "os/exec", imp == "github.com/modelgate/modelgate/internal/freeze", imp == "github.com/modelgate/modelgate/internal/demo":
			t.Errorf("internal/web imports %s", imp)
		}
	}
}
