package main

import (
	"github.com/schollz/progressbar/v3"

	"modelgate/internal/artifact"
)

// progress returns an event sink that draws a byte progress bar per blob
// on an interactive stderr, and nothing otherwise (piped, --json, --quiet).
func (g *globals) progress() func(artifact.Event) {
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
