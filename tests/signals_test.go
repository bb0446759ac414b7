package tests

import (
	"errors"
	"fmt"
	"net"
	"os/exec"
	"strings"
	"syscall"
	"testing"
	"time"

	"trapline/internal/freeport"
)

// TestSecondSignalExitsAtOnce: the first SIGTERM starts a graceful shutdown
// that waits (up to shutdown_timeout) to deliver spooled alerts to a NATS
// server that is away; a second SIGTERM ends the process at once.
func TestSecondSignalExitsAtOnce(t *testing.T) {
	// Mostly waiting (for an outage, a drain): runs beside the others.
	t.Parallel()
	ns := startNATS(t)
	feed, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer feed.Close()
	httpPort := freeport.Take(t)
	cfg := writeConfig(t, fmt.Sprintf(`data_dir: %s
shutdown_timeout: 60s
http:
  listen: 127.0.0.1:%d
nats:
  url: %s
  alerts_stream:
    max_bytes: 16MiB
  breaths_stream:
    max_bytes: 64MiB
streams:
  - id: bed-9
    source: tcp://%s
`, t.TempDir(), httpPort, ns.URL(), feed.Addr()))
	p := startDaemonProcess(t, "run", "--config", cfg)

	// Two seconds of signal, then silence on an open connection: after
	// detectors.signal.lost_after_s the daemon raises signal-lost, and
	// with NATS stopped it waits in the spool.
	if err := feed.(*net.TCPListener).SetDeadline(time.Now().Add(30 * time.Second)); err != nil {
		t.Fatal(err)
	}
	conn, err := feed.Accept()
	if err != nil {
		t.Fatalf("the daemon did not connect to the feed: %v", err)
	}
	defer conn.Close()
	var buf []byte
	for n := range 200 {
		buf = defaultLung.appendLine(buf, n)
	}
	if _, err := conn.Write(buf); err != nil {
		t.Fatal(err)
	}
	waitFor(t, 20*time.Second, "the samples to be read", func() bool { return metricsOf(httpPort)["trapline_samples_total"] >= 200 })
	ns.stop()
	waitFor(t, 30*time.Second, "an alert waiting in the spool", func() bool { return metricsOf(httpPort)["trapline_spool_depth"] >= 1 })

	if err := p.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	select {
	case <-p.done:
		t.Fatalf("the daemon exited at the first signal instead of draining its spool:\n%s", p.out.String())
	case <-time.After(1500 * time.Millisecond):
	}
	if !strings.Contains(p.out.String(), "shutting down") {
		t.Errorf("no shutdown message after the first signal:\n%s", p.out.String())
	}
	start := time.Now()
	if err := p.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	select {
	case <-p.done:
	case <-time.After(5 * time.Second):
		t.Fatal("the daemon did not exit within 5 s of the second signal")
	}
	t.Logf("exited %v after the second signal: %v", time.Since(start).Round(time.Millisecond), p.err)
	var ee *exec.ExitError
	if !errors.As(p.err, &ee) {
		t.Fatalf("want the process ended by the signal, got %v", p.err)
	}
	if ws, ok := ee.Sys().(syscall.WaitStatus); !ok || !ws.Signaled() || ws.Signal() != syscall.SIGTERM {
		t.Errorf("want the process killed by SIGTERM (default action), got %v", p.err)
	}
}
