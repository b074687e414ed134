package main

import (
	"encoding/json"
	"os"

	"github.com/schollz/progressbar/v3"
	"golang.org/x/term"

	"modelgate/internal/artifact"
	"modelgate/internal/checks"
)

// progress returns an event sink that draws a byte progress bar per blob
// on an interactive stderr, and nothing otherwise (piped, --json, --quiet).
func (g *globals) progress() func(artifact.Event) {
	if g.JSON && !g.Quiet {
		return g.jsonProgress()
	}
	if !g.interactive() {
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
		case "verify":
			if bar == nil || current != "verify" {
				current = "verify"
				bar = progressbar.NewOptions64(-1, progressbar.OptionSetWriter(g.Stderr),
					progressbar.OptionSetDescription("verifying manifests"), progressbar.OptionClearOnFinish())
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

// gateProgress draws the gate's phases on an interactive stderr.
func (g *globals) gateProgress() func(checks.Event) {
	if !g.interactive() {
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
