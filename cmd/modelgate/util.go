package main

import (
	"strings"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/release"
)

func usageErr(format string, args ...any) error {
	return errkind.New(errkind.BadInput, format, args...)
}

// warnKeyForm notes on stderr that a key file is in the deprecated form
// (a name line before the PEM block), which still works.
func warnKeyForm(g *globals, src string, k *release.Key) {
	if k != nil && k.NameLine {
		g.logf("note: %s starts with a %q line, a form modelgate no longer writes (it still reads it); the name now comes from the policy. Rewrite it as plain PKCS#8 PEM: openssl pkey -in OLD -out NEW", strings.TrimPrefix(src, "file:"), "modelgate-key-name:")
	}
}
