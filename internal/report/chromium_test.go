package report

import (
	"bytes"
	"context"
	"image"
	"image/png"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/report/reporttest"
)

// chromium finds Debian's chromium; without it the test fails when CI is
// set and is skipped otherwise.
func chromium(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"chromium", "/usr/bin/chromium"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("CI") != "" {
		t.Fatal("chromium not found (Debian package chromium); CI must install it")
	}
	t.Skip("chromium not found (Debian package chromium)")
	return ""
}

// runChromium runs headless Chromium on page with the given extra
// arguments, in a fresh profile, with no network use of its own.
func runChromium(t *testing.T, bin, page string, args ...string) []byte {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	base := []string{"--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
		"--disable-background-networking", "--disable-component-update", "--disable-sync",
		"--user-data-dir=" + t.TempDir()}
	cmd := exec.CommandContext(ctx, bin, append(append(base, args...), "file://"+page)...)
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	if err := cmd.Run(); err != nil {
		t.Fatalf("chromium %v: %v\n%s", args, err, stderr.String())
	}
	return stdout.Bytes()
}

// TestChromiumLoadsPage loads the HTML page in headless Chromium: the DOM
// it builds holds the verdict and every plot, and its screenshot is a
// picture, not a blank page.
func TestChromiumLoadsPage(t *testing.T) {
	bin := chromium(t)
	for _, tc := range []struct {
		name    string
		r       *checks.Report
		verdict string
		svgs    int
	}{
		{"scorer", reporttest.Scorer(), "may replace promo-scorer@sha256:222222222222… on promo-scorer:prod", 5},
		{"failing", reporttest.Failing(), "2 check(s) failed: contract, holdout", 5},
		{"encoder", reporttest.Encoder(3), "may replace listener-encoder@sha256:222222222222… on listener-encoder:prod", 7},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			page := filepath.Join(dir, tc.name+".html")
			var b bytes.Buffer
			if err := HTML(&b, tc.r); err != nil {
				t.Fatal(err)
			}
			if err := os.WriteFile(page, b.Bytes(), 0o644); err != nil {
				t.Fatal(err)
			}

			dom := string(runChromium(t, bin, page, "--dump-dom"))
			if !strings.Contains(dom, tc.verdict) {
				t.Errorf("dumped DOM lacks the verdict %q", tc.verdict)
			}
			if n := strings.Count(dom, "<svg"); n != tc.svgs {
				t.Errorf("dumped DOM has %d svg elements, want %d", n, tc.svgs)
			}
			if n := strings.Count(dom, `role="img"`); n != tc.svgs {
				t.Errorf("dumped DOM has %d labelled images, want %d", n, tc.svgs)
			}
			if strings.Contains(dom, "could not be drawn") {
				t.Errorf("a plot failed to draw")
			}

			shot := filepath.Join(dir, tc.name+".png")
			runChromium(t, bin, page, "--screenshot="+shot, "--window-size=1200,3000", "--hide-scrollbars")
			f, err := os.Open(shot)
			if err != nil {
				t.Fatalf("no screenshot: %v", err)
			}
			defer f.Close()
			img, err := png.Decode(f)
			if err != nil {
				t.Fatalf("screenshot is not a PNG: %v", err)
			}
			checkScreenshot(t, img, tc.r.Verdict == checks.VerdictPass)

			// At 1000 CSS px the page's 24 px right padding stays blank
			// all the way down: no table (the slice table has ten columns)
			// or plot runs past the content's edge.
			narrow := filepath.Join(dir, tc.name+"-1000.png")
			runChromium(t, bin, page, "--screenshot="+narrow, "--window-size=1000,9000", "--hide-scrollbars")
			checkRightPadding(t, narrow, 1000-24)
			if *keep != "" {
				raw, _ := os.ReadFile(shot)
				os.WriteFile(filepath.Join(*keep, tc.name+".png"), raw, 0o644)
			}
		})
	}
}

// checkScreenshot asserts the picture has the window's size, many colours
// and enough ink, and that the verdict banner's tint is at the top.
func checkScreenshot(t *testing.T, img image.Image, pass bool) {
	t.Helper()
	bounds := img.Bounds()
	if bounds.Dx() != 1200 || bounds.Dy() != 3000 {
		t.Errorf("screenshot is %v, want 1200×3000", bounds.Size())
	}
	colours := map[[3]uint32]bool{}
	ink, all := 0, 0
	for y := bounds.Min.Y; y < bounds.Max.Y; y += 2 {
		for x := bounds.Min.X; x < bounds.Max.X; x += 2 {
			r, g, b, _ := img.At(x, y).RGBA()
			colours[[3]uint32{r >> 8, g >> 8, b >> 8}] = true
			if r>>8 < 0xf0 || g>>8 < 0xf0 || b>>8 < 0xf0 {
				ink++
			}
			all++
		}
	}
	if len(colours) < 50 {
		t.Errorf("screenshot has %d colours: a blank or broken page", len(colours))
	}
	if frac := float64(ink) / float64(all); frac < 0.03 {
		t.Errorf("only %.1f%% of the screenshot is not white", 100*frac)
	}
	// The banner's background (#e9f5ec pass, #fdecea fail) fills the top.
	want := [3]uint32{0xe9, 0xf5, 0xec}
	if !pass {
		want = [3]uint32{0xfd, 0xec, 0xea}
	}
	found := 0
	for y := 0; y < 250; y++ {
		for x := 0; x < 1200; x += 4 {
			r, g, b, _ := img.At(x, y).RGBA()
			if [3]uint32{r >> 8, g >> 8, b >> 8} == want {
				found++
			}
		}
	}
	if found < 1000 {
		t.Errorf("the verdict banner's colour #%02x%02x%02x covers only %d sampled pixels at the top", want[0], want[1], want[2], found)
	}
}

// checkRightPadding asserts that every pixel of the screenshot file right
// of x is white.
func checkRightPadding(t *testing.T, file string, x int) {
	t.Helper()
	f, err := os.Open(file)
	if err != nil {
		t.Fatalf("no screenshot: %v", err)
	}
	defer f.Close()
	img, err := png.Decode(f)
	if err != nil {
		t.Fatalf("screenshot is not a PNG: %v", err)
	}
	b := img.Bounds()
	for y := b.Min.Y; y < b.Max.Y; y++ {
		for xx := x + 1; xx < b.Max.X; xx++ {
			if r, g, bl, _ := img.At(xx, y).RGBA(); r>>8 != 0xff || g>>8 != 0xff || bl>>8 != 0xff {
				t.Errorf("at 1000 px the page runs past its content's right edge: pixel (%d, %d) is not white", xx, y)
				return
			}
		}
	}
}
