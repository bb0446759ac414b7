// Package browsertest drives headless Chromium (the Debian package
// chromium) through the DevTools protocol for the browser tests of the live
// view: in daemon/web against the hub alone, and in daemon against a
// running daemon. A test is skipped, saying so, only when no Chromium
// binary is found.
package browsertest

import (
	"bytes"
	"context"
	"image/png"
	"os"
	"os/exec"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
)

// Chromium returns the browser binary: $TRAPLINE_CHROMIUM, or the first of
// the usual names on PATH; it skips the test when there is none.
func Chromium(t testing.TB) string {
	t.Helper()
	if p := os.Getenv("TRAPLINE_CHROMIUM"); p != "" {
		return p
	}
	for _, name := range []string{"chromium", "chromium-browser", "google-chrome", "/usr/bin/chromium"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	t.Skip("no Chromium binary found (install the Debian package: apt-get install -y chromium, or set TRAPLINE_CHROMIUM); the browser test did not run")
	return ""
}

// Browser starts a headless Chromium with a fresh profile for at most
// timeout; the returned context ends it. At the end of the test it fails
// the test for every error the page wrote to the console (an exception, a
// refused resource, a violation of the content security policy).
func Browser(t testing.TB, timeout time.Duration) context.Context {
	t.Helper()
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(Chromium(t)),
		chromedp.Flag("headless", true),
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.Flag("disable-quic", true),
		chromedp.NoFirstRun,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.Flag("hide-scrollbars", true),
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(1200, 1600),
	}
	ctx, cancel := context.WithTimeout(context.Background(), timeout)
	actx, acancel := chromedp.NewExecAllocator(ctx, opts...)
	bctx, bcancel := chromedp.NewContext(actx)
	if err := chromedp.Do(bctx); err != nil {
		bcancel()
		acancel()
		cancel()
		t.Fatalf("start chromium: %v", err)
	}
	var mu sync.Mutex
	var problems []string
	done := make(chan struct{})
	messages := chromedp.Console(bctx)
	go func() {
		defer close(done)
		for m, err := range messages {
			if err != nil {
				return
			}
			if m.Type == chromedp.ConsoleError || m.IsException() {
				mu.Lock()
				problems = append(problems, m.String())
				mu.Unlock()
			}
		}
	}()
	t.Cleanup(func() {
		bcancel()
		acancel()
		cancel()
		<-done
		mu.Lock()
		defer mu.Unlock()
		for _, p := range problems {
			t.Errorf("page console: %s", p)
		}
	})
	return bctx
}

// WaitJS evaluates expr every 50 ms until it is true, for at most d, and
// returns when it first was.
func WaitJS(t testing.TB, ctx context.Context, what, expr string, d time.Duration) time.Time {
	t.Helper()
	end := time.Now().Add(d)
	for {
		ok, err := chromedp.Run(ctx, chromedp.Evaluate[bool](expr))
		if err != nil {
			t.Fatalf("%s: %v", what, err)
		}
		if ok {
			return time.Now()
		}
		if time.Now().After(end) {
			t.Fatalf("%s: not seen within %v", what, d)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// Screenshot saves the whole page as name: in the test's temporary
// directory, or where $TRAPLINE_SHOT_DIR says (docs/img to refresh the
// documentation). It checks that the picture is a PNG of at least
// 1000×1000 pixels.
func Screenshot(t testing.TB, ctx context.Context, name string) {
	t.Helper()
	buf, err := chromedp.Run(ctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatalf("screenshot: %v", err)
	}
	img, err := png.Decode(bytes.NewReader(buf))
	if err != nil {
		t.Fatalf("screenshot is not a PNG: %v", err)
	}
	if b := img.Bounds(); b.Dx() < 1000 || b.Dy() < 1000 {
		t.Errorf("screenshot %v, want at least 1000×1000", b)
	}
	dir := os.Getenv("TRAPLINE_SHOT_DIR")
	if dir == "" {
		dir = t.TempDir()
	}
	p := filepath.Join(dir, name)
	if err := os.WriteFile(p, buf, 0o644); err != nil {
		t.Fatalf("write %s: %v", p, err)
	}
	t.Logf("screenshot %s", p)
}
