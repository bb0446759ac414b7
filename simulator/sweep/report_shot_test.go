package sweep

import (
	"context"
	"image/png"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
	"time"
)

// screenshotReport renders the report in headless Chromium, as
// scripts/screenshot-report.sh does, and checks that the plots are
// visible: the screenshot must hold many pixels of the plots' first line
// colour. It is skipped, saying so, when Chromium is not installed.
func screenshotReport(t *testing.T, report string) {
	t.Helper()
	browser, err := exec.LookPath("chromium")
	if err != nil {
		t.Skip("chromium not installed (apt-get install -y chromium); the report was checked without rendering")
	}
	out := filepath.Join(t.TempDir(), "report.png")
	ctx, cancel := context.WithTimeout(t.Context(), 90*time.Second)
	defer cancel()
	cmd := exec.CommandContext(ctx, browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
		"--no-first-run", "--disable-background-networking", "--disable-component-update", "--disable-sync",
		"--user-data-dir="+t.TempDir(), "--hide-scrollbars", "--screenshot="+out, "--window-size=1200,2400",
		"file://"+report)
	if msg, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("chromium: %v\n%s", err, msg)
	}
	f, err := os.Open(out)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	img, err := png.Decode(f)
	if err != nil {
		t.Fatalf("screenshot: %v", err)
	}
	b := img.Bounds()
	if b.Dx() != 1200 || b.Dy() != 2400 {
		t.Errorf("screenshot is %v, want 1200×2400", b)
	}
	// Count pixels near the palette's blue (0, 114, 178): lines of the
	// sensitivity curve and the histogram outlines.
	blue := 0
	for y := b.Min.Y; y < b.Max.Y; y++ {
		for x := b.Min.X; x < b.Max.X; x++ {
			r, g, bl, _ := img.At(x, y).RGBA()
			if r>>8 < 40 && g>>8 > 90 && g>>8 < 140 && bl>>8 > 150 && bl>>8 < 210 {
				blue++
			}
		}
	}
	if blue < 500 {
		t.Errorf("only %d plot-coloured pixels in the screenshot: the plots did not render", blue)
	}
}
