package main

import (
	"bytes"
	"strings"
	"testing"
	"time"
)

// TestPlainProgress: off a terminal, progress prints a line when a phase
// starts and the latest state on every tick (the ticker is replaced by a
// channel the test owns, and ticks are delivered by hand: no clock).
func TestPlainProgress(t *testing.T) {
	var errOut bytes.Buffer
	ticks := make(chan time.Time)
	g := &globals{Stderr: &errOut, ticks: ticks}
	p := g.plainProgress()
	p.event("gate holdout", "", 0, 1000, "rows")
	p.event("gate holdout", "", 250, 1000, "rows")
	p.tick()
	p.event("gate holdout", "", 500, 1000, "rows")
	p.tick()
	p.event("upload", "encoder.safetensors", 1<<20, 4<<20, "bytes")
	g.end()
	want := []string{
		"modelgate: gate holdout 0 rows of 1000 rows (0%)",
		"modelgate: gate holdout 250 rows of 1000 rows (25%)",
		"modelgate: gate holdout 500 rows of 1000 rows (50%)",
		"modelgate: upload encoder.safetensors 1.0 MiB of 4.0 MiB (25%)",
	}
	if got := strings.Split(strings.TrimSpace(errOut.String()), "\n"); strings.Join(got, "\n") != strings.Join(want, "\n") {
		t.Errorf("plain progress:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
	// --quiet: nothing at all.
	q := &globals{Stderr: &errOut, Quiet: true}
	if q.plainProgress() != nil {
		t.Error("--quiet still prints progress")
	}
}
