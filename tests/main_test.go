// Package tests holds the end-to-end tests of trapline: the daemon with a
// real NATS server, the simulator over a real pseudo-terminal or TCP socket,
// and subscribers that check what arrives.
package tests

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"os/exec"
	"sync"
	"syscall"
	"testing"
	"time"

	"trapline/daemon/cli"
)

// execDaemonEnv makes the test binary behave as the trapline command, so that
// a test can run the daemon as a separate process (to kill it) without
// building a binary first.
const execDaemonEnv = "TRAPLINE_TESTS_EXEC_DAEMON"

func TestMain(m *testing.M) {
	if os.Getenv(execDaemonEnv) == "1" {
		os.Exit(cli.Main(os.Args[1:]))
	}
	os.Exit(m.Run())
}

// daemonProcess is trapline running as a child process of the test.
type daemonProcess struct {
	t    *testing.T
	cmd  *exec.Cmd
	out  *lockedBuffer
	done chan struct{}
	err  error
}

// startDaemonProcess runs `trapline <args>` as a child process; it is killed
// at the end of the test if still running.
func startDaemonProcess(t *testing.T, args ...string) *daemonProcess {
	t.Helper()
	cmd := exec.Command(os.Args[0], args...)
	cmd.Env = append(os.Environ(), execDaemonEnv+"=1")
	out := &lockedBuffer{}
	cmd.Stdout, cmd.Stderr = out, out
	if err := cmd.Start(); err != nil {
		t.Fatalf("start daemon: %v", err)
	}
	p := &daemonProcess{t: t, cmd: cmd, out: out, done: make(chan struct{})}
	go func() {
		p.err = cmd.Wait()
		close(p.done)
	}()
	t.Cleanup(func() {
		select {
		case <-p.done:
		default:
			_ = cmd.Process.Kill()
			<-p.done
		}
		if t.Failed() {
			t.Logf("daemon output:\n%s", out.String())
		}
	})
	return p
}

// kill sends SIGKILL and waits for the process to be gone.
func (p *daemonProcess) kill() {
	p.t.Helper()
	_ = p.cmd.Process.Signal(syscall.SIGKILL)
	select {
	case <-p.done:
	case <-time.After(10 * time.Second):
		p.t.Fatal("daemon did not die within 10 s of SIGKILL")
	}
}

// stop sends SIGTERM and waits at most d for a clean exit.
func (p *daemonProcess) stop(d time.Duration) error {
	p.t.Helper()
	_ = p.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-p.done:
		return p.err
	case <-time.After(d):
		return fmt.Errorf("daemon did not stop within %v of SIGTERM", d)
	}
}

// lockedBuffer collects a child's output safely.
type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// runDaemon runs `trapline <args>` in-process until ctx is cancelled and
// returns its exit code and output.
func runDaemon(ctx context.Context, args ...string) (int, string) {
	var out lockedBuffer
	code := cli.Run(ctx, args, bytes.NewReader(nil), &out, &out)
	return code, out.String()
}
