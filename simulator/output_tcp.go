package simulator

import (
	"context"
	"errors"
	"fmt"
	"net"
	"sync"
	"time"

	"trapline/ingest/backoff"
)

// tcpOutput connects to a listening reader. While the reader is away the
// samples are lost (as from a device on a dead link) and the connection is
// retried at most once per second.
type tcpOutput struct {
	addr     string
	status   func(string)
	header   []byte
	mu       sync.Mutex
	conn     net.Conn
	closed   bool
	down     bool // scripted disconnection in progress
	lastDial time.Time
}

// dialTimeout bounds one connection attempt; openWait bounds how long Open
// waits for a reader that is not listening yet.
const (
	dialTimeout = 2 * time.Second
	openWait    = 30 * time.Second
)

// Open connects before the first sample. A reader started at the same time
// (a daemon and a simulator launched together by one script) may not be
// listening yet: a refused connection is retried, 100 ms doubling to 1 s,
// for up to openWait, so that a run at full speed loses nothing to the race.
func (o *tcpOutput) Open(ctx context.Context, header []byte) error {
	o.header = header
	parent := ctx
	ctx, cancel := context.WithTimeout(ctx, openWait)
	defer cancel()
	wait := backoff.Backoff{Min: 100 * time.Millisecond, Max: time.Second}
	for said := false; ; said = true {
		err := o.dial(ctx)
		if err == nil || errors.Is(err, net.ErrClosed) {
			return err
		}
		if !said {
			o.status(fmt.Sprintf("waiting for a reader on %s: %v", o.addr, err))
		}
		if !wait.Wait(ctx) {
			if parent.Err() != nil {
				return err
			}
			return fmt.Errorf("%w (gave up after %v)", err, openWait)
		}
	}
}

func (o *tcpOutput) dial(ctx context.Context) error {
	o.lastDial = time.Now()
	d := net.Dialer{Timeout: dialTimeout}
	c, err := d.DialContext(ctx, "tcp", o.addr)
	if err != nil {
		return fmt.Errorf("connect %s: %w", o.addr, err)
	}
	o.mu.Lock()
	if o.closed {
		o.mu.Unlock()
		c.Close()
		return net.ErrClosed
	}
	o.conn = c
	o.mu.Unlock()
	o.status("connected to " + o.addr)
	if len(o.header) > 0 {
		if _, err := c.Write(o.header); err != nil {
			o.drop(err)
		}
	}
	return nil
}

// drop closes a connection that failed; the next writes retry.
func (o *tcpOutput) drop(err error) {
	o.mu.Lock()
	c := o.conn
	o.conn = nil
	o.mu.Unlock()
	if c != nil {
		c.Close()
		o.status(fmt.Sprintf("lost %s: %v", o.addr, err))
	}
}

func (o *tcpOutput) Write(p []byte) error {
	o.mu.Lock()
	c, closed, down := o.conn, o.closed, o.down
	o.mu.Unlock()
	if closed {
		return net.ErrClosed
	}
	if down {
		return nil
	}
	if c == nil {
		if time.Since(o.lastDial) < time.Second {
			return nil
		}
		ctx, cancel := context.WithTimeout(context.Background(), dialTimeout)
		err := o.dial(ctx)
		cancel()
		if err != nil {
			return nil // still away: the samples are lost
		}
		o.mu.Lock()
		c = o.conn
		o.mu.Unlock()
		if c == nil {
			return nil
		}
	}
	if _, err := c.Write(p); err != nil {
		o.drop(err)
	}
	return nil
}

func (o *tcpOutput) Disconnect() error {
	o.mu.Lock()
	o.down = true
	c := o.conn
	o.conn = nil
	o.mu.Unlock()
	if c != nil {
		c.Close()
	}
	return nil
}

func (o *tcpOutput) Reconnect(ctx context.Context) error {
	o.mu.Lock()
	o.down = false
	o.mu.Unlock()
	if err := o.dial(ctx); err != nil {
		o.status(err.Error()) // retried by the next writes
	}
	return nil
}

func (o *tcpOutput) Close() error {
	o.mu.Lock()
	o.closed = true
	c := o.conn
	o.conn = nil
	o.mu.Unlock()
	if c != nil {
		return c.Close()
	}
	return nil
}

func (o *tcpOutput) MaxWrite() int { return 0 }
