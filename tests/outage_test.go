package tests

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"trapline/daemon/cli"
	"trapline/internal/freeport"
)

// runBronchospasm starts `trapline run --config cfg` as a child process,
// waits for its /metrics on httpPort, and plays the bronchospasm scenario as
// bed-5 over the pseudo-terminal link at 60× real time (18 simulated
// minutes in 18 s) until it has played or ctx ends; simDone then receives
// the simulator's error.
func runBronchospasm(ctx context.Context, t *testing.T, cfg string, httpPort int, link string) (*daemonProcess, <-chan error) {
	t.Helper()
	proc := startDaemonProcess(t, "run", "--config", cfg)
	waitFor(t, 30*time.Second, "the daemon's /metrics", func() bool { return metricsOf(httpPort) != nil })
	simDone := make(chan error, 1)
	go func() { simDone <- streamScenario(ctx, "bronchospasm", "bed-5", link, 60) }()
	return proc, simDone
}

// outageConfig is a daemon reading the pseudo-terminal link and publishing
// to the external server at natsURL.
func outageConfig(t *testing.T, dir, link, natsURL string, httpPort int) string {
	return writeConfig(t, externalNATSConfig(dir, natsURL, httpPort, "", fmt.Sprintf(`streams:
  - id: bed-5
    source: serial://%s?baud=115200
`, link)))
}

// externalNATSConfig is the configuration of a daemon that publishes to the
// external server at natsURL and serves HTTP on httpPort, with extra keys
// at the top level (spool:) and its inputs (streams: or sources:).
func externalNATSConfig(dir, natsURL string, httpPort int, extra, inputs string) string {
	return fmt.Sprintf(`data_dir: %s
shutdown_timeout: 5s
http:
  listen: 127.0.0.1:%d
log:
  level: warn
%snats:
  url: %s
  publish_timeout: 500ms
  alerts_stream:
    max_bytes: 16MiB
  breaths_stream:
    max_bytes: 64MiB
# The counts compared in the tests must not race a signal-lost alert
# raised when the patient's recording ends.
detectors:
  signal:
    lost_after_s: 600
%s`, dir, httpPort, extra, natsURL, inputs)
}

var seriesLine = regexp.MustCompile(`^([a-z_]+)(\{[^}]*\})? ([0-9.e+-]+)$`)

// metricsOf scrapes /metrics and sums the series of each name; nil when the
// daemon does not answer.
func metricsOf(port int) map[string]float64 {
	c := http.Client{Timeout: 2 * time.Second}
	resp, err := c.Get(fmt.Sprintf("http://127.0.0.1:%d/metrics", port))
	if err != nil {
		return nil
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		return nil
	}
	out := map[string]float64{}
	for _, l := range strings.Split(string(b), "\n") {
		m := seriesLine.FindStringSubmatch(l)
		if m == nil {
			continue
		}
		v, _ := strconv.ParseFloat(m[3], 64)
		out[m[1]] += v
	}
	return out
}

// jetStreamOf connects to the server and returns its JetStream context.
func jetStreamOf(t *testing.T, url string) jetstream.JetStream {
	t.Helper()
	nc, err := nats.Connect(url, nats.MaxReconnects(-1))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	return js
}

// stable waits until f returns the same value twice, 1 s apart, and returns it.
func stable(t *testing.T, d time.Duration, what string, f func() float64) float64 {
	t.Helper()
	prev := -1.0
	var v float64
	waitFor(t, d, what, func() bool {
		v = f()
		if v == prev {
			return true
		}
		prev = v
		time.Sleep(time.Second)
		return false
	})
	return v
}

// TestNATSOutageLosesNoAlert: the NATS server goes away for 30 s while the
// patient's alerts are being raised and comes back on the same store; every
// alert event the daemon produced is then in JetStream exactly once.
func TestNATSOutageLosesNoAlert(t *testing.T) {
	// Mostly waiting (for an outage, a drain): runs beside the others.
	t.Parallel()
	ns := startNATS(t)
	dir := t.TempDir()
	link := filepath.Join(dir, "ventilator")
	httpPort := freeport.Take(t)
	cfg := outageConfig(t, dir, link, ns.URL(), httpPort)

	ctx, cancel := context.WithTimeout(t.Context(), 3*time.Minute)
	defer cancel()
	dctx, stopDaemon := context.WithCancel(ctx)
	defer stopDaemon()
	codec := make(chan int, 1)
	var dout string
	go func() {
		code, out := runDaemon(dctx, "run", "--config", cfg)
		dout = out
		codec <- code
	}()
	waitFor(t, 30*time.Second, "the daemon's /metrics", func() bool { return metricsOf(httpPort) != nil })

	// The patient plays at 30× for 36 s; its alerts come from about 6 s on.
	simDone := make(chan error, 1)
	go func() { simDone <- streamScenario(ctx, "bronchospasm", "bed-5", link, 30) }()

	// At the first alert event, the server goes down for 30 s.
	waitFor(t, 60*time.Second, "the first alert event", func() bool { return metricsOf(httpPort)["trapline_alerts_total"] >= 1 })
	if code, body := readyz(httpPort); code != http.StatusOK {
		t.Errorf("/readyz while streaming: %d %q, want 200", code, body)
	}
	ns.stop()
	outage := time.Now()
	before := metricsOf(httpPort)["trapline_alerts_total"]
	var maxDepth float64
	for time.Since(outage) < 30*time.Second {
		m := metricsOf(httpPort)
		maxDepth = max(maxDepth, m["trapline_spool_depth"])
		if m["trapline_nats_connected"] != 0 {
			t.Fatal("daemon reports NATS connected during the outage")
		}
		time.Sleep(500 * time.Millisecond)
	}
	if code, body := readyz(httpPort); code != http.StatusServiceUnavailable || !strings.Contains(body, "nats: not connected") {
		t.Errorf("/readyz during the outage: %d %q, want 503 naming nats", code, body)
	}
	during := metricsOf(httpPort)["trapline_alerts_total"] - before
	t.Logf("during the 30 s outage: %.0f alert events raised, spool depth up to %.0f", during, maxDepth)
	if during < 3 || maxDepth < 3 {
		t.Fatalf("want several alert events spooled during the outage, got %.0f (spool depth %.0f)", during, maxDepth)
	}
	ns.start()
	// (The patient may have ended by now, so the stream itself may not be
	// ready; NATS must be.)
	waitFor(t, 30*time.Second, "/readyz to stop naming nats", func() bool {
		code, body := readyz(httpPort)
		return code != 0 && !strings.Contains(body, "nats:")
	})

	if err := <-simDone; err != nil {
		t.Fatalf("simulator: %v", err)
	}
	total := stable(t, 30*time.Second, "the alert count to settle", func() float64 { return metricsOf(httpPort)["trapline_alerts_total"] })
	waitFor(t, 30*time.Second, "the spool to drain", func() bool { return metricsOf(httpPort)["trapline_spool_depth"] == 0 })

	stored := storedAlerts(t, jetStreamOf(t, ns.URL()), "TRAPLINE_ALERTS")
	checkOnce(t, stored, stored)
	if len(stored) != int(total) {
		t.Errorf("JetStream holds %d alert events, the daemon produced %.0f", len(stored), total)
	}
	t.Logf("%d alert events, each stored once:\n%s", len(stored), describe(stored))

	stopDaemon()
	select {
	case code := <-codec:
		if code != cli.ExitOK {
			t.Errorf("daemon exit code %d:\n%s", code, dout)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("daemon did not stop within 30 s")
	}
}

// TestKilledDuringOutageLosesNoAlert: the daemon, a separate process, is
// killed with SIGKILL while NATS is away and its alerts wait in the spool;
// restarted on the same data directory once NATS is back, it delivers them,
// none lost and none twice.
func TestKilledDuringOutageLosesNoAlert(t *testing.T) {
	// Mostly waiting (for an outage, a drain): runs beside the others.
	t.Parallel()
	ns := startNATS(t)
	dir := t.TempDir()
	link := filepath.Join(dir, "ventilator")
	httpPort := freeport.Take(t)
	cfg := outageConfig(t, dir, link, ns.URL(), httpPort)

	ctx, cancel := context.WithTimeout(t.Context(), 3*time.Minute)
	defer cancel()
	first, simDone := runBronchospasm(ctx, t, cfg, httpPort, link)
	waitFor(t, 60*time.Second, "the first alert event", func() bool { return metricsOf(httpPort)["trapline_alerts_total"] >= 1 })
	ns.stop()
	if err := <-simDone; err != nil {
		t.Fatalf("simulator: %v", err)
	}
	// Everything the first daemon raised is counted; what NATS did not
	// take is in its spool.
	producedFirst := stable(t, 30*time.Second, "the first daemon's alert count to settle",
		func() float64 { return metricsOf(httpPort)["trapline_alerts_total"] })
	spooled := metricsOf(httpPort)["trapline_spool_depth"]
	t.Logf("first daemon: %.0f alert events, %.0f waiting in the spool when killed", producedFirst, spooled)
	if spooled < 2 {
		t.Fatalf("want alert events in the spool at the kill, got %.0f", spooled)
	}
	first.kill()

	ns.start()
	second := startDaemonProcess(t, "run", "--config", cfg)
	waitFor(t, 30*time.Second, "the second daemon's /metrics", func() bool { return metricsOf(httpPort) != nil })
	waitFor(t, 30*time.Second, "the spool to drain", func() bool {
		m := metricsOf(httpPort)
		return m != nil && m["trapline_spool_depth"] == 0 && m["trapline_nats_connected"] == 1
	})
	producedSecond := stable(t, 20*time.Second, "the second daemon's alert count to settle",
		func() float64 { return metricsOf(httpPort)["trapline_alerts_total"] })
	waitFor(t, 30*time.Second, "the spool to drain again", func() bool { return metricsOf(httpPort)["trapline_spool_depth"] == 0 })

	stored := storedAlerts(t, jetStreamOf(t, ns.URL()), "TRAPLINE_ALERTS")
	checkOnce(t, stored, stored)
	if want := int(producedFirst + producedSecond); len(stored) != want {
		t.Errorf("JetStream holds %d alert events, the two daemons produced %d", len(stored), want)
	}
	t.Logf("%d alert events, each stored once:\n%s", len(stored), describe(stored))
	if err := second.stop(30 * time.Second); err != nil {
		t.Error(err)
	}
}

// readyz returns the status code and body of /readyz.
func readyz(port int) (int, string) {
	c := http.Client{Timeout: 2 * time.Second}
	resp, err := c.Get(fmt.Sprintf("http://127.0.0.1:%d/readyz", port))
	if err != nil {
		return 0, err.Error()
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// TestStartsWhileNATSIsAway: an unreachable server at start is an outage,
// not a failure; once the server comes, the streams are created and the
// daemon is ready.
func TestStartsWhileNATSIsAway(t *testing.T) {
	t.Parallel()
	ns := startNATS(t)
	ns.stop()
	dir := t.TempDir()
	httpPort := freeport.Take(t)
	cfg := outageConfig(t, dir, filepath.Join(dir, "no-port-yet"), ns.URL(), httpPort)
	ctx, cancel := context.WithTimeout(t.Context(), time.Minute)
	defer cancel()
	codec := make(chan int, 1)
	go func() {
		code, _ := runDaemon(ctx, "run", "--config", cfg)
		codec <- code
	}()
	waitFor(t, 30*time.Second, "/readyz to name nats and jetstream", func() bool {
		code, body := readyz(httpPort)
		return code == http.StatusServiceUnavailable && strings.Contains(body, "nats: not connected") && strings.Contains(body, "jetstream:")
	})
	ns.start()
	waitFor(t, 30*time.Second, "/readyz to stop naming nats and jetstream", func() bool {
		code, body := readyz(httpPort)
		return code != 0 && !strings.Contains(body, "nats:") && !strings.Contains(body, "jetstream:")
	})
	if _, err := jetStreamOf(t, ns.URL()).Stream(ctx, "TRAPLINE_ALERTS"); err != nil {
		t.Errorf("alerts stream not created after NATS came: %v", err)
	}
	cancel()
	select {
	case code := <-codec:
		if code != cli.ExitOK {
			t.Errorf("exit code %d after cancellation", code)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("daemon did not stop within 30 s")
	}
}
