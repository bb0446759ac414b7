package tests

import (
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"
)

// TestSimPTYWithoutReaderKeepsTime: `sim --out pty` with nobody reading
// the pseudo-terminal drops what does not fit, as a cable would, and ends
// on time: 120 simulated seconds at 60× take about 2 s, not for ever. A
// second run is ended by the first SIGINT, and one by the first SIGTERM.
func TestSimPTYWithoutReaderKeepsTime(t *testing.T) {
	t.Parallel()
	link := filepath.Join(t.TempDir(), "vent")
	start := time.Now()
	p := startDaemonProcess(t, "sim", "--out", "pty", "--link", link, "--speed", "60", "--duration", "120s")
	select {
	case <-p.done:
	case <-time.After(10 * time.Second):
		t.Fatalf("sim with no reader still running after 10 s (2 s due):\n%s", p.out.String())
	}
	took := time.Since(start)
	if p.err != nil {
		t.Errorf("sim: %v\n%s", p.err, p.out.String())
	}
	out := p.out.String()
	if !strings.Contains(out, "bytes nobody read were dropped") {
		t.Errorf("no count of dropped bytes in the output:\n%s", out)
	}
	t.Logf("120 s at 60× with no reader took %v; %s", took.Round(10*time.Millisecond), lastLine(out, "dropped"))
	if took > 6*time.Second {
		t.Errorf("took %v, want about 2 s (+ at most the 1 s drain check)", took)
	}
	for _, sig := range []syscall.Signal{syscall.SIGINT, syscall.SIGTERM} {
		q := startDaemonProcess(t, "sim", "--out", "pty", "--link", link+sig.String(), "--speed", "1", "--duration", "1h")
		time.Sleep(1500 * time.Millisecond)
		sent := time.Now()
		_ = q.cmd.Process.Signal(sig)
		select {
		case <-q.done:
			t.Logf("%v: ended %v after the first signal", sig, time.Since(sent).Round(time.Millisecond))
		case <-time.After(5 * time.Second):
			t.Fatalf("sim still running 5 s after the first %v", sig)
		}
	}
}

func lastLine(s, containing string) string {
	lines := strings.Split(s, "\n")
	for i := len(lines) - 1; i >= 0; i-- {
		if strings.Contains(lines[i], containing) {
			return strings.TrimSpace(lines[i])
		}
	}
	return ""
}
