package daemon

import (
	"context"
	"encoding/json"
	"fmt"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/chromedp"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"trapline/alerts"
	"trapline/config"
	"trapline/daemon/internal/browsertest"
	"trapline/daemon/web"
	"trapline/ingest"
	"trapline/simulator"
)

// liveDaemon runs the whole daemon in-process (role all, embedded NATS on a
// free port, HTTP on 127.0.0.1) with one stream read from a virtual serial
// port that the simulator plays the shipped scenario into at speed. It
// returns the daemon, where it runs, and a NATS connection to it.
func liveDaemon(t *testing.T, ctx context.Context, scenario string, speed float64) (*Daemon, Info, *nats.Conn, string) {
	t.Helper()
	sc, err := simulator.Shipped(scenario)
	if err != nil {
		t.Fatal(err)
	}
	sim, err := simulator.New(sc)
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	link := filepath.Join(dir, "ventilator")
	port, err := simulator.ParseOutput("pty", simulator.OutputOptions{Link: link})
	if err != nil {
		t.Fatal(err)
	}
	cfg := config.Default()
	cfg.DataDir = dir
	cfg.HTTP.Listen = "127.0.0.1:0"
	cfg.NATS.Embedded.Port = 0
	cfg.Streams = []config.Stream{{ID: sim.Stream(), Source: "serial://" + link + "?baud=115200"}}
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	if cfg.Role != config.RoleAll {
		t.Fatalf("default role %q, want %q", cfg.Role, config.RoleAll)
	}
	r := startDaemonWith(t, cfg, Options{})
	d, info := r.d, r.info
	waitFor(t, 10*time.Second, "the JetStream streams", func() bool { return d.AlertStreamsReady() == nil })
	nc, err := nats.Connect(info.NATSURL)
	if err != nil {
		t.Fatal(err)
	}
	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: 3})
	if err != nil {
		t.Fatal(err)
	}
	simCtx, stopSim := context.WithCancel(ctx)
	simDone := make(chan struct{})
	go func() {
		defer close(simDone)
		_, _ = simulator.Stream(simCtx, sim, port, simulator.StreamOptions{Encoder: enc, Speed: speed})
	}()
	// Cleanups run last first: the simulator stops before the daemon.
	t.Cleanup(func() {
		nc.Close()
		stopSim()
		<-simDone
	})
	return d, info, nc, sim.Stream()
}

// TestLiveViewAgainstDaemon: the live view of a running daemon fed by the
// simulator over a virtual serial port lists the stream, its waveform grows,
// the air-trapping alarm the daemon publishes on NATS shows on the page
// within 10 breaths, and the page's acknowledge button acknowledges it in
// JetStream (through the daemon's acknowledgement service).
func TestLiveViewAgainstDaemon(t *testing.T) {
	bctx := browsertest.Browser(t, 40*time.Second)
	d, info, nc, stream := liveDaemon(t, bctx, "hyperinflation", 6)
	subj := alerts.Subjects{Prefix: d.cfg.NATS.SubjectPrefix}
	raised := make(chan raise, 1)
	sub, err := nc.Subscribe(subj.Alert(stream), func(m *nats.Msg) {
		var ev alerts.Event
		if json.Unmarshal(m.Data, &ev) == nil && ev.Condition == "air-trapping" && ev.State == alerts.Raised {
			select {
			case raised <- raise{ev, time.Now(), d.streams[0].breaths.Load()}:
			default:
			}
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Unsubscribe()

	url := "http://" + info.HTTPAddr + web.Path
	if err := chromedp.Do(bctx, chromedp.Navigate(url)); err != nil {
		t.Fatalf("open %s: %v", url, err)
	}
	row := fmt.Sprintf(`document.querySelector('#streams tr[data-stream=%q]')`, stream)
	browsertest.WaitJS(t, bctx, "stream list", row+` !== null`, 10*time.Second)
	browsertest.WaitJS(t, bctx, "first waveform points", fmt.Sprintf(`traplineLive.selected() === %q && traplineLive.wavePoints() > 0`, stream), 10*time.Second)
	points := func() int {
		n, err := chromedp.Run(bctx, chromedp.Evaluate[int](`traplineLive.wavePoints()`))
		if err != nil {
			t.Fatalf("read point count: %v", err)
		}
		return n
	}
	p1, t1 := points(), time.Now()

	r, seen := alarmOnPage(t, bctx, d, row, raised)
	time.Sleep(time.Until(t1.Add(3 * time.Second)))
	p2 := points()
	t.Logf("waveform points: %d, 3 s later %d", p1, p2)
	if p2 <= p1 {
		t.Errorf("waveform did not grow over 3 s: %d then %d points", p1, p2)
	}
	seq := -1
	if r.ev.BreathSeq != nil {
		seq = *r.ev.BreathSeq
	}
	t.Logf("air-trapping raised at breath_seq %d, t=%.1f s; on NATS with %d breaths analysed; on the page %v later with %d analysed (page shows %s)",
		seq, r.ev.TS, r.breaths, seen.at.Sub(r.at).Round(time.Millisecond), seen.breaths, seen.page)
	if late := int64(seen.breaths) - int64(r.breaths); late > 10 {
		t.Errorf("alarm shown %d breaths after its NATS event, want at most 10", late)
	}
	if n, err := strconv.Atoi(seen.page); err == nil && seq >= 0 && n-seq > 11 {
		t.Errorf("page shows %d breaths with the alarm of breath %d: more than 10 later", n, seq)
	}

	const ackButton = chromedp.CSS(`#active tr[data-condition="air-trapping"] button.ack`)
	if err := chromedp.Do(bctx, chromedp.WaitVisible(ackButton), chromedp.SendKeys(chromedp.CSS(`#ack-by`), "page-tester")); err != nil {
		t.Fatalf("acknowledge button: %v", err)
	}
	attr, err := chromedp.Run(bctx, chromedp.AttributeValue(ackButton, "data-id"))
	if err != nil || !attr.Exists {
		t.Fatalf("acknowledge button id: %v (found %v)", err, attr.Exists)
	}
	if err := chromedp.Do(bctx, chromedp.Click(ackButton)); err != nil {
		t.Fatalf("click acknowledge: %v", err)
	}
	acked := ackedInJetStream(t, bctx, nc, d.cfg.JetStream().WithDefaults().Alerts, attr.Value)
	t.Logf("acknowledged in JetStream: %s: %s", acked.ID, acked.Message)
	browsertest.WaitJS(t, bctx, "acknowledged alarm on the page",
		`document.querySelector('#active tr[data-condition="air-trapping"][data-state="acknowledged"]') !== null`, 5*time.Second)
	time.Sleep(1500 * time.Millisecond) // a few more breaths on the trends for the picture
	browsertest.Screenshot(t, bctx, "live-view-daemon.png")
}

// raise is an alarm's raise as the test saw it on NATS, with the breaths
// the daemon had analysed then.
type raise struct {
	ev      alerts.Event
	at      time.Time
	breaths uint64
}

// sighting is the alarm's first appearance on the page: when, the breaths
// the daemon had analysed then, and the breath count the page showed.
type sighting struct {
	at      time.Time
	breaths uint64
	page    string
}

// alarmOnPage watches the page and NATS together, for at most 15 s, until
// it has the air-trapping raise from NATS and the alarm in the page's row
// of the stream.
func alarmOnPage(t *testing.T, bctx context.Context, d *Daemon, row string, raised <-chan raise) (raise, sighting) {
	t.Helper()
	var r raise
	var got bool
	var seen sighting
	for end := time.Now().Add(15 * time.Second); !got || seen.at.IsZero(); {
		if time.Now().After(end) {
			t.Fatalf("within 15 s: air-trapping on NATS %v, on the page %v", got, !seen.at.IsZero())
		}
		select {
		case r = <-raised:
			got = true
		default:
		}
		if seen.at.IsZero() {
			txt, err := chromedp.Run(bctx, chromedp.Evaluate[string](
				`(() => { const r = `+row+`; return r && r.cells[7].textContent.includes("air-trapping") ? r.cells[2].textContent : ""; })()`))
			if err != nil {
				t.Fatal(err)
			}
			if txt != "" {
				seen = sighting{time.Now(), d.streams[0].breaths.Load(), txt}
			}
		}
		time.Sleep(50 * time.Millisecond)
	}
	return r, seen
}

// ackedInJetStream reads the alerts stream until it holds the
// acknowledged event of the alarm with the given id (bounded by 10 s).
func ackedInJetStream(t *testing.T, ctx context.Context, nc *nats.Conn, name, id string) alerts.Event {
	t.Helper()
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	cons, err := js.OrderedConsumer(ctx, name, jetstream.OrderedConsumerConfig{})
	if err != nil {
		t.Fatalf("read %s: %v", name, err)
	}
	for {
		m, err := cons.Next(jetstream.FetchContext(ctx))
		if err != nil {
			t.Fatalf("no acknowledged event of %s in %s: %v", id, name, err)
		}
		var ev alerts.Event
		if json.Unmarshal(m.Data(), &ev) == nil && ev.State == alerts.Acknowledged && (ev.ID == id || ev.Supersedes == id) {
			if !strings.Contains(ev.Message, "page-tester") {
				t.Errorf("acknowledged event %q does not name page-tester", ev.Message)
			}
			return ev
		}
	}
}
