package report

import (
	"io"
	"testing"

	"github.com/modelgate/modelgate/internal/report/reporttest"
)

func BenchmarkHTML(b *testing.B) {
	r := reporttest.Scorer()
	for b.Loop() {
		if err := HTML(io.Discard, r); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkTerminal(b *testing.B) {
	r := reporttest.Failing()
	for b.Loop() {
		if err := Terminal(io.Discard, r, TerminalOptions{Color: true}); err != nil {
			b.Fatal(err)
		}
	}
}
