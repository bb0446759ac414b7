package web

import (
	"context"
	"errors"
	"fmt"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"trapline/alerts"
	"trapline/daemon/internal/browsertest"
)

// The browser tests drive headless Chromium through daemon/internal/browsertest
// against a real HTTP server on 127.0.0.1; they skip, saying so, only when
// no Chromium binary is found.

var (
	browser = browsertest.Browser
	waitJS  = browsertest.WaitJS
)

// liveServer serves the live view of hub on 127.0.0.1 and runs the hub.
func liveServer(t testing.TB, hub *Hub, acker Acker) string {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); _ = hub.Run(ctx) }()
	mux := http.NewServeMux()
	Mount(mux, NewHandler(hub, acker))
	srv := httptest.NewServer(mux) // listens on 127.0.0.1
	t.Cleanup(func() {
		cancel()
		<-done
		srv.Close()
	})
	return srv.URL + Path
}

// xssStream is a stream id that would run script if it were ever put into
// the page as markup.
const xssStream = `zz<img src=x onerror="window.__xss=1">`

// TestBrowserLiveView: the page lists the streams, the waveform grows,
// an air-trapping alarm shows within 10 breaths of its event, and the
// acknowledge button goes to the Acker with the alarm's id.
func TestBrowserLiveView(t *testing.T) {
	bctx := browser(t, 60*time.Second)
	hub := NewHub(HubConfig{})
	ctx, cancel := context.WithCancel(context.Background())
	var wg sync.WaitGroup
	defer func() { cancel(); wg.Wait() }()

	stable := newFeeder(t, hub, "stable", 1) // bench-3, real time
	trap := newFeeder(t, hub, "hyperinflation", 4)
	type raise struct {
		id      string
		at      time.Time
		breaths int64
	}
	raised := make(chan raise, 1)
	trap.onAlert = func(ev alerts.Event, breaths int64) {
		if ev.Condition == "air-trapping" && ev.State == alerts.Raised {
			select {
			case raised <- raise{ev.ID, time.Now(), breaths}:
			default:
			}
		}
	}
	hub.Samples(xssStream, samples(0, 10, 100))
	url := liveServer(t, hub, trap)
	wg.Add(1)
	go func() { defer wg.Done(); stable.run(ctx) }()

	if err := chromedp.Do(bctx, chromedp.Navigate(url)); err != nil {
		t.Fatalf("open %s: %v", url, err)
	}
	waitJS(t, bctx, "stream list", `window.traplineLive && traplineLive.streams().includes("bench-3") && document.querySelector('#streams tr[data-stream="bench-3"]') !== null`, 10*time.Second)
	waitJS(t, bctx, "first waveform points", `traplineLive.selected() === "bench-3" && traplineLive.wavePoints() > 0`, 10*time.Second)
	points := func() int {
		n, err := chromedp.Run(bctx, chromedp.Evaluate[int](`traplineLive.wavePoints()`))
		if err != nil {
			t.Fatalf("read point count: %v", err)
		}
		return n
	}
	p1 := points()
	time.Sleep(3 * time.Second)
	p2 := points()
	t.Logf("waveform points: %d, 3 s later %d", p1, p2)
	if p2 <= p1 {
		t.Errorf("waveform did not grow over 3 s: %d then %d points", p1, p2)
	}

	// The air-trapping stream starts now, with the page open.
	wg.Add(1)
	go func() { defer wg.Done(); trap.run(ctx) }()
	var r raise
	select {
	case r = <-raised:
	case <-time.After(20 * time.Second):
		t.Fatal("no air-trapping alarm raised within 20 s")
	}
	seen := waitJS(t, bctx, "alarm in the list",
		`(() => { const r = document.querySelector('#streams tr[data-stream="icu-04"]'); return !!r && r.cells[7].textContent.includes("air-trapping"); })()`,
		10*time.Second)
	late := trap.breaths.Load() - r.breaths
	t.Logf("air-trapping raised at %s (breath %d), on the page %v later, after %d more breaths",
		r.at.Format("15:04:05.000"), r.breaths, seen.Sub(r.at).Round(time.Millisecond), late)
	if late > 10 {
		t.Errorf("alarm shown %d breaths after its event, want at most 10", late)
	}

	acknowledgeOnPage(t, bctx, trap)
	checkEscaped(t, bctx)
	waitJS(t, bctx, "acknowledgement in the timeline",
		`Array.from(document.querySelectorAll('#timeline td')).some(td => td.textContent.includes("acknowledged by <b>tester</b>"))`, 5*time.Second)
	time.Sleep(1500 * time.Millisecond) // a few more breaths on the trends for the picture
	browsertest.Screenshot(t, bctx, "live-view.png")
}

// acknowledgeOnPage shows icu-04, acknowledges its air-trapping alarm with
// the page's button as someone whose name is markup, and checks that the
// Acker got the id the button carried and that the page shows the alarm
// acknowledged.
func acknowledgeOnPage(t *testing.T, bctx context.Context, trap *feeder) {
	t.Helper()
	const ackButton = chromedp.CSS(`#active tr[data-condition="air-trapping"] button.ack`)
	if err := chromedp.Do(bctx,
		chromedp.Click(chromedp.CSS(`#streams tr[data-stream="icu-04"] button.sid`)),
		chromedp.WaitVisible(ackButton),
		chromedp.SendKeys(chromedp.CSS(`#ack-by`), "<b>tester</b>"),
	); err != nil {
		t.Fatalf("select icu-04: %v", err)
	}
	attr, err := chromedp.Run(bctx, chromedp.AttributeValue(ackButton, "data-id"))
	if err != nil || !attr.Exists {
		t.Fatalf("acknowledge button: %v (id attribute found: %v)", err, attr.Exists)
	}
	id := attr.Value
	if err := chromedp.Do(bctx, chromedp.Click(ackButton)); err != nil {
		t.Fatalf("click acknowledge: %v", err)
	}
	waitJS(t, bctx, "acknowledged alarm",
		`document.querySelector('#active tr[data-condition="air-trapping"][data-state="acknowledged"]') !== null`, 10*time.Second)
	calls := trap.ackCalls()
	if len(calls) != 1 || calls[0].Stream != "icu-04" || calls[0].ID != id || calls[0].By != "<b>tester</b>" {
		t.Errorf("acknowledgements %+v, want one of %q by <b>tester</b>", calls, id)
	}
}

// checkEscaped checks that text from the data stayed text: the stream id
// made of markup ran no script and made no element.
func checkEscaped(t *testing.T, bctx context.Context) {
	t.Helper()
	xss, err1 := chromedp.Run(bctx, chromedp.Evaluate[bool](`window.__xss === 1`))
	markup, err2 := chromedp.Run(bctx, chromedp.Evaluate[bool](`document.querySelector('#timeline b, #active b, #streams b, #streams img') !== null`))
	row, err3 := chromedp.Run(bctx, chromedp.Evaluate[string](`Array.from(document.querySelectorAll('#streams button.sid')).map(b => b.textContent).join("|")`))
	if err := errors.Join(err1, err2, err3); err != nil {
		t.Fatal(err)
	}
	if xss || markup || !strings.Contains(row, xssStream) {
		t.Errorf("data rendered as markup: script ran %v, element from data %v, ids %q", xss, markup, row)
	}
}

// TestBrowser200Streams: with 200 streams breathing, the page lists them
// all, keeps rendering, and reports its update work per animation frame
// (measured by the page around its render). The time of that work is a
// speed figure and is measured by BenchmarkBrowser200Streams: here, on a
// machine shared with other tests, it is only logged.
func TestBrowser200Streams(t *testing.T) {
	bctx, hub := browse200(t)
	st := frameWindow(t, bctx, 4*time.Second)
	t.Logf("200 streams: %d frames in 4 s, update work per frame p50 %.1f ms, p95 %.1f ms, p99 %.1f ms, max %.1f ms",
		st.Frames, st.P50, st.P95, st.P99, st.Max)
	t.Logf("slowest frames: %+v", st.Worst)
	hs := hub.Stats()
	t.Logf("hub: %+v", hs)
	// The page renders at most ten times a second, once per message; a
	// starved renderer still draws some frames in 4 s.
	if st.Frames == 0 || st.Frames > 60 {
		t.Errorf("%d frames rendered in 4 s, want 1 to 60 (at most one a message, ten a second)", st.Frames)
	}
	if !(st.P50 > 0) || st.Max < st.P99 || st.P99 < st.P50 || len(st.Worst) == 0 {
		t.Errorf("frame figures inconsistent: %+v", st)
	}
	if hs.ClientsServed != 1 || hs.ClientsDropped != 0 || hs.RefusedStreams != 0 {
		t.Errorf("hub served %d clients, dropped %d, refused %d streams: want 1, 0, 0",
			hs.ClientsServed, hs.ClientsDropped, hs.RefusedStreams)
	}
	browsertest.Screenshot(t, bctx, "live-view-200.png")
}

// BenchmarkBrowser200Streams measures the page's update work per
// animation frame with 200 streams breathing, one 4 s window an
// iteration, and reports the median and p99 frame averaged over the
// windows and the slowest frame of all, in milliseconds: the target is
// every frame under 16 ms (one frame at 60 Hz). The recording lasts 90 s,
// so up to about 20 windows. Run it on a quiet machine:
//
//	go test ./daemon/web -run '^$' -bench Browser200Streams -benchtime 4x
func BenchmarkBrowser200Streams(b *testing.B) {
	bctx, _ := browse200(b)
	var p50, p99, worst, frames float64
	windows := 0
	for b.Loop() {
		st := frameWindow(b, bctx, 4*time.Second)
		p50 += st.P50
		p99 += st.P99
		worst = max(worst, st.Max)
		frames += float64(st.Frames)
		windows++
	}
	b.ReportMetric(p50/float64(windows), "p50-ms/frame")
	b.ReportMetric(p99/float64(windows), "p99-ms/frame")
	b.ReportMetric(worst, "max-ms/frame")
	b.ReportMetric(frames/float64(windows), "frames/window")
	b.ReportMetric(0, "ns/op")
}

// browse200 opens the live view in headless Chromium while a recording
// plays at real time under 200 stream ids, and returns once the page lists
// all of them and has run for 2 s.
func browse200(t testing.TB) (context.Context, *Hub) {
	t.Helper()
	bctx := browser(t, 120*time.Second)
	rec := record(t, "hyperinflation", 90)
	hub := NewHub(HubConfig{})
	url := liveServer(t, hub, nil)
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan struct{})
	go func() { defer close(done); replay(ctx, hub, rec, 200, 20*time.Millisecond) }()
	t.Cleanup(func() { cancel(); <-done })
	if err := chromedp.Do(bctx, chromedp.Navigate(url)); err != nil {
		t.Fatalf("open %s: %v", url, err)
	}
	waitJS(t, bctx, "200 streams listed", `window.traplineLive && document.querySelectorAll('#streams tbody tr').length === 200`, 15*time.Second)
	time.Sleep(2 * time.Second)
	return bctx, hub
}

// frameWindow resets the page's frame figures, waits d and returns them.
// A window holds about 40 frames, among them updates of the shown
// stream's trends and alarms (a breath every 2.7 s).
func frameWindow(t testing.TB, bctx context.Context, d time.Duration) frameStats {
	t.Helper()
	if _, err := chromedp.Run(bctx, chromedp.Evaluate[any](`traplineLive.resetFrameStats()`)); err != nil {
		t.Fatal(err)
	}
	time.Sleep(d)
	st, err := chromedp.Run(bctx, chromedp.Evaluate[frameStats](`traplineLive.frameStats()`))
	if err != nil {
		t.Fatal(err)
	}
	return st
}

// frameStats is what the page reports of its own update work.
type frameStats struct {
	Frames     int       `json:"frames"`
	Max        float64   `json:"max"`
	P50        float64   `json:"p50"`
	P95        float64   `json:"p95"`
	P99        float64   `json:"p99"`
	SnapshotMs []float64 `json:"snapshotMs"`
	Worst      []struct {
		Ms    float64 `json:"ms"`
		Parts string  `json:"parts"`
	} `json:"worst"`
}

// replay plays a recording as n streams at real time, each shifted by a
// different offset so that their breaths do not fall together, in steps
// of every; the part of each stream before its offset goes in at once.
func replay(ctx context.Context, hub *Hub, rec *recording, n int, every time.Duration) {
	type cursor struct {
		id         string
		offS       float64
		si, bi, ei int
	}
	cs := make([]cursor, n)
	for i := range cs {
		cs[i] = cursor{id: fmt.Sprintf("bed-%03d", i+1), offS: float64(i%97) * 0.61}
	}
	start := time.Now()
	tk := time.NewTicker(every)
	defer tk.Stop()
	for {
		nowS := time.Since(start).Seconds()
		for i := range cs {
			c := &cs[i]
			upto := nowS + c.offS
			j := c.si
			for j < len(rec.samples) && rec.samples[j].TimeS <= upto {
				j++
			}
			hub.Samples(c.id, rec.samples[c.si:j])
			c.si = j
			for ; c.bi < len(rec.breaths) && rec.breaths[c.bi].EndS <= upto; c.bi++ {
				b := rec.breaths[c.bi]
				b.Stream = c.id
				hub.Breath(b)
			}
			for ; c.ei < len(rec.events) && rec.events[c.ei].TS <= upto; c.ei++ {
				ev := rec.events[c.ei]
				ev.Stream = c.id
				ev.ID = c.id + strings.TrimPrefix(ev.ID, "icu-04")
				if ev.Supersedes != "" {
					ev.Supersedes = c.id + strings.TrimPrefix(ev.Supersedes, "icu-04")
				}
				hub.Alert(ev)
			}
		}
		select {
		case <-ctx.Done():
			return
		case <-tk.C:
		}
	}
}
