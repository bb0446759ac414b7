package simulator

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"sync"
	"sync/atomic"
	"time"

	"github.com/creack/pty"
	"golang.org/x/term"
)

// ptyOutput writes to a pseudo-terminal, a stand-in for a serial cable: a
// reader opens the slave path (or the stable symbolic link) like a serial
// port. A scripted disconnection closes the master, which makes every read
// on the slave fail, like a pulled cable; the reconnection opens a new
// pseudo-terminal and points the link at it.
type ptyOutput struct {
	link   string
	status func(string)
	mu     sync.Mutex
	master *os.File
	slave  *os.File
	path   string
	closed bool
	header []byte
	onPTY  func(string)
	// dropped counts the bytes nobody read: the terminal's buffer was
	// full, as a cable drops what the far end does not take.
	dropped atomic.Uint64
	// paced: drop what the reader does not take (a paced run); otherwise
	// writes wait for the reader.
	paced bool
}

func (o *ptyOutput) keepTime(paced bool) { o.paced = paced }

// PTYPath returns the slave path of the current pseudo-terminal, or "" when
// none is open. out must come from ParseOutput("pty", ...).
func PTYPath(out Output) string {
	o, ok := out.(*ptyOutput)
	if !ok {
		return ""
	}
	o.mu.Lock()
	defer o.mu.Unlock()
	return o.path
}

func (o *ptyOutput) Open(_ context.Context, header []byte) error {
	o.header = header
	return o.open()
}

func (o *ptyOutput) open() error {
	master, slave, err := pty.Open()
	if err != nil {
		return fmt.Errorf("open pseudo-terminal: %w", err)
	}
	// Raw mode: no echo back into the master, no line editing, no
	// translation of CR, ^S or ^Q bytes in binary frames. Our slave handle
	// stays open so the settings hold until a reader opens the port.
	if _, err := term.MakeRaw(int(slave.Fd())); err != nil {
		master.Close()
		slave.Close()
		return fmt.Errorf("raw mode on %s: %w", slave.Name(), err)
	}
	if o.link != "" {
		tmp := o.link + ".tmp"
		_ = os.Remove(tmp)
		if err := os.Symlink(slave.Name(), tmp); err != nil {
			master.Close()
			slave.Close()
			return fmt.Errorf("link %s: %w", o.link, err)
		}
		// Rename replaces the old link atomically: a reader never sees the
		// path missing.
		if err := os.Rename(tmp, o.link); err != nil {
			master.Close()
			slave.Close()
			return fmt.Errorf("link %s: %w", o.link, err)
		}
	}
	o.mu.Lock()
	if o.closed {
		o.mu.Unlock()
		master.Close()
		slave.Close()
		return os.ErrClosed
	}
	o.master, o.slave, o.path = master, slave, slave.Name()
	o.mu.Unlock()
	msg := "pseudo-terminal " + slave.Name()
	if o.link != "" {
		abs, _ := filepath.Abs(o.link)
		msg += " (link " + abs + ")"
	}
	o.status(msg)
	if o.onPTY != nil {
		o.onPTY(slave.Name())
	}
	// The header waits in the terminal's input queue for the reader.
	return o.Write(o.header)
}

func (o *ptyOutput) Write(p []byte) error {
	o.mu.Lock()
	m := o.master
	o.mu.Unlock()
	if m == nil || len(p) == 0 {
		return nil // disconnected: the samples are lost
	}
	if !o.paced {
		if _, err := m.Write(p); err != nil {
			return fmt.Errorf("write pseudo-terminal: %w", err)
		}
		return nil
	}
	n, err := writeNonBlocking(m, p)
	if n < len(p) {
		// A cable does not wait for its reader: what the terminal's
		// buffer cannot take now is lost, and the run keeps time.
		if o.dropped.Add(uint64(len(p)-n)) == uint64(len(p)-n) {
			o.status("nobody reads the pseudo-terminal: dropping what does not fit, as a cable would")
		}
	}
	if err != nil {
		return fmt.Errorf("write pseudo-terminal: %w", err)
	}
	return nil
}

// Dropped returns the bytes dropped because nobody read them.
func (o *ptyOutput) Dropped() uint64 { return o.dropped.Load() }

func (o *ptyOutput) Disconnect() error {
	o.mu.Lock()
	m, s := o.master, o.slave
	o.master, o.slave, o.path = nil, nil, ""
	o.mu.Unlock()
	if m != nil {
		m.Close()
		s.Close()
		o.status("pseudo-terminal closed (disconnection)")
	}
	return nil
}

func (o *ptyOutput) Reconnect(_ context.Context) error { return o.open() }

func (o *ptyOutput) Close() error {
	o.mu.Lock()
	o.closed = true
	if n := o.dropped.Load(); n > 0 {
		o.status(fmt.Sprintf("%d bytes nobody read were dropped", n))
	}
	m, s := o.master, o.slave
	o.master, o.slave, o.path = nil, nil, ""
	o.mu.Unlock()
	if m != nil {
		m.Close()
		s.Close()
	}
	if o.link != "" {
		if target, err := os.Readlink(o.link); err == nil && s != nil && target == s.Name() {
			os.Remove(o.link)
		}
	}
	return nil
}

func (o *ptyOutput) MaxWrite() int { return 0 }

// drainQuietTicks is how many 5 ms readings in a row must find the input
// queue empty: 300 ms, longer than the kernel takes to move bytes from the
// master to that queue even on a heavily loaded machine (a reader lost
// samples with 100 ms on a busy two-core machine).
const drainQuietTicks = 60

// drainStalledTicks: a queue that has not moved for 1 s (5 ms ticks) has
// no reader.
const drainStalledTicks = 200

// drain waits until the reader has taken everything written, or until ctx
// ends, so that closing the master at the end of a run loses nothing. The
// input queue must read empty several times in a row: bytes written to the
// master reach that queue through the kernel's buffer asynchronously, so
// one empty reading does not mean that nothing is on its way.
func (o *ptyOutput) drain(ctx context.Context) {
	o.mu.Lock()
	s := o.slave
	o.mu.Unlock()
	if s == nil {
		return
	}
	tick := time.NewTicker(5 * time.Millisecond)
	defer tick.Stop()
	prev, stalled := -1, 0
	for empty := 0; empty < drainQuietTicks; {
		n, err := inputQueued(s)
		if err != nil {
			return
		}
		if n == 0 {
			empty++
		} else {
			empty = 0
		}
		// Nobody reads: the queue does not move. Waiting longer would
		// only make the run late.
		if n > 0 && n == prev {
			if stalled++; stalled >= drainStalledTicks {
				return
			}
		} else {
			stalled = 0
		}
		prev = n
		select {
		case <-ctx.Done():
			return
		case <-tick.C:
		}
	}
}
