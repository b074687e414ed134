package main

import (
	"encoding/json"
	"fmt"
	"io"
	"os"
	"strings"
	"sync"
	"time"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/report"
)

// progress returns an event sink for the long commands, in three modes:
// a byte progress bar per blob on an interactive stderr; with --json one
// JSON Lines event per progress event on stderr; otherwise (stderr piped
// or a file, as in CI) a plain line when a phase starts and then one every
// progress interval (plainProgress). --quiet silences all three.
func (g *globals) progress() func(artifact.Event) {
	if g.JSON && !g.Quiet {
		return g.jsonProgress()
	}
	if !g.interactive() {
		if p := g.plainProgress(); p != nil {
			return func(e artifact.Event) {
				switch e.Phase {
				case "verify", "mark":
					// One manifest after another: a line per phase, not per name.
					p.event(e.Phase, "", e.Done, e.Total, "manifests")
					return
				case "reclaim-tag", "reclaim-manifest", "reclaim-blob":
					p.event("reclaim", "", e.Done, e.Total, "removals")
					return
				}
				p.event(e.Phase, e.Name, e.Done, e.Total, "bytes")
			}
		}
		return nil
	}
	var bar *progressbar.ProgressBar
	var current string
	return func(e artifact.Event) {
		switch e.Phase {
		case "upload", "download":
			if bar == nil || current != e.Phase+e.Name {
				if bar != nil {
					_ = bar.Finish()
				}
				current = e.Phase + e.Name
				bar = progressbar.NewOptions64(e.Total,
					progressbar.OptionSetWriter(g.Stderr),
					progressbar.OptionSetDescription(e.Phase+" "+e.Name),
					progressbar.OptionShowBytes(true),
					progressbar.OptionSetPredictTime(true),
					progressbar.OptionClearOnFinish(),
					progressbar.OptionThrottle(100_000_000),
				)
			}
			_ = bar.Set64(e.Done)
		case "verify", "mark":
			if bar == nil || current != e.Phase {
				current = e.Phase
				desc := map[string]string{"verify": "verifying manifests", "mark": "reading manifests"}[e.Phase]
				bar = progressbar.NewOptions64(-1, progressbar.OptionSetWriter(g.Stderr),
					progressbar.OptionSetDescription(desc), progressbar.OptionClearOnFinish())
			}
			_ = bar.Set64(e.Done)
		case "reclaim-tag", "reclaim-manifest", "reclaim-blob":
			if bar == nil || current != "reclaim" {
				current = "reclaim"
				bar = progressbar.NewOptions64(e.Total, progressbar.OptionSetWriter(g.Stderr),
					progressbar.OptionSetDescription("removing"), progressbar.OptionClearOnFinish())
			}
			_ = bar.Set64(e.Done)
		default:
			if bar != nil {
				_ = bar.Finish()
				bar = nil
			}
		}
	}
}

// progressEvent is one line of --json progress on stderr.
type progressEvent struct {
	Event string `json:"event"` // always "progress"
	Phase string `json:"phase"` // upload, skip, download, manifest, tag, scan, verify
	Name  string `json:"name"`
	Done  int64  `json:"done"`
	Total int64  `json:"total"`
}

// jsonProgress writes progress events as JSON Lines on stderr (stdout keeps
// the command's one JSON result).
func (g *globals) jsonProgress() func(artifact.Event) {
	enc := json.NewEncoder(g.Stderr)
	return func(e artifact.Event) {
		_ = enc.Encode(progressEvent{Event: "progress", Phase: e.Phase, Name: e.Name, Done: e.Done, Total: e.Total})
	}
}

// colorStdout reports whether stdout is a terminal that may get colour
// (NO_COLOR unset).
func (g *globals) colorStdout() bool {
	if g.JSON || os.Getenv("NO_COLOR") != "" {
		return false
	}
	f, ok := g.Stdout.(*os.File)
	return ok && term.IsTerminal(int(f.Fd()))
}

// gateProgress reports the gate's phases in the three modes of progress.
func (g *globals) gateProgress() func(checks.Event) {
	if g.JSON && !g.Quiet {
		enc := json.NewEncoder(g.Stderr)
		return func(e checks.Event) {
			_ = enc.Encode(progressEvent{Event: "progress", Phase: e.Phase, Done: e.Done, Total: e.Total})
		}
	}
	if !g.interactive() {
		if p := g.plainProgress(); p != nil {
			return func(e checks.Event) { p.event("gate "+e.Phase, "", e.Done, e.Total, "rows") }
		}
		return nil
	}
	var bar *progressbar.ProgressBar
	phase := ""
	return func(e checks.Event) {
		if e.Phase != phase {
			if bar != nil {
				_ = bar.Finish()
			}
			phase = e.Phase
			total := e.Total
			if total <= 0 {
				total = -1
			}
			bar = progressbar.NewOptions64(total, progressbar.OptionSetWriter(g.Stderr),
				progressbar.OptionSetDescription("gate: "+e.Phase), progressbar.OptionShowCount(),
				progressbar.OptionClearOnFinish(), progressbar.OptionThrottle(100_000_000))
		}
		if e.Done > 0 {
			_ = bar.Set64(e.Done)
		}
	}
}

// EnvProgressInterval sets how often progress prints a plain line off a
// terminal (a Go duration such as "5s" or "500ms"; default 5s).
const EnvProgressInterval = "MODELGATE_PROGRESS_INTERVAL"

const defaultProgressInterval = 5 * time.Second

// plainLines prints progress off a terminal: a line when a phase (or the
// blob it works on) starts, and on every tick the latest state again, so
// that a CI job that kills silent steps sees life during long phases.
type plainLines struct {
	mu    sync.Mutex
	w     io.Writer
	start string // phase+name of the last line
	line  string // the latest state
}

// plainProgress returns the plain-line printer of this command, starting
// its ticker (g.ticks, else every $MODELGATE_PROGRESS_INTERVAL) on first
// use; nil with --quiet. The ticker stops when the command ends.
func (g *globals) plainProgress() *plainLines {
	if g.Quiet {
		return nil
	}
	if g.plain != nil {
		return g.plain
	}
	p := &plainLines{w: g.Stderr}
	g.plain = p
	ticks, stop := g.ticks, func() {}
	if ticks == nil {
		every := defaultProgressInterval
		if v := os.Getenv(EnvProgressInterval); v != "" {
			if d, err := time.ParseDuration(v); err == nil && d > 0 {
				every = d
			}
		}
		t := time.NewTicker(every)
		ticks, stop = t.C, t.Stop
	}
	done, exited := make(chan struct{}), make(chan struct{})
	go func() {
		defer close(exited)
		for {
			select {
			case <-ticks:
				p.tick()
			case <-done:
				return
			}
		}
	}()
	g.atEnd = append(g.atEnd, func() { stop(); close(done); <-exited })
	return p
}

func (p *plainLines) event(phase, name string, done, total int64, unit string) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.line = progressLine(phase, name, done, total, unit)
	if key := phase + "\x00" + name; key != p.start {
		p.start = key
		fmt.Fprintln(p.w, p.line)
	}
}

func (p *plainLines) tick() {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.line != "" {
		fmt.Fprintln(p.w, p.line)
	}
}

// progressLine renders one progress state: "modelgate: upload
// encoder.safetensors 1.2 MiB of 3.0 MiB (40%)".
func progressLine(phase, name string, done, total int64, unit string) string {
	var b strings.Builder
	b.WriteString("modelgate: ")
	b.WriteString(phase)
	if name != "" {
		b.WriteString(" " + name)
	}
	amount := func(n int64) string {
		if unit == "bytes" {
			return report.HumanBytes(n)
		}
		return fmt.Sprintf("%d %s", n, unit)
	}
	switch {
	case total > 0:
		fmt.Fprintf(&b, " %s of %s (%d%%)", amount(done), amount(total), done*100/total)
	case done > 0:
		b.WriteString(" " + amount(done))
	}
	return b.String()
}
