package web

import (
	"regexp"
	"strings"
)

// command is a CLI command a page shows for an action the view cannot take.
type command struct {
	// Label says what the command does.
	Label string
	// Text is the command line, quoted for a POSIX shell.
	Text string
}

var shellSafe = regexp.MustCompile(`^[A-Za-z0-9_./:@=+,%-]+$`)

// shellQuote quotes s for a POSIX shell unless it needs no quoting.
func shellQuote(s string) string {
	if s != "" && shellSafe.MatchString(s) {
		return s
	}
	return "'" + strings.ReplaceAll(s, "'", `'\''`) + "'"
}

// cli builds a modelgate command line from its words, adding --store when
// the server was told the store's location.
func (s *Server) cli(words ...string) string {
	parts := []string{"modelgate"}
	for _, w := range words {
		parts = append(parts, shellQuote(w))
	}
	if s.opts.StoreFlag != "" {
		parts = append(parts, "--store", shellQuote(s.opts.StoreFlag))
	}
	return strings.Join(parts, " ")
}

// Placeholders in commands for what only the person running them knows.
const (
	keyPlaceholder    = "YOUR.key.pem"
	policyPlaceholder = "POLICY.yaml"
)
