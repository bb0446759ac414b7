package simulator

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"os"
	"strings"
	"sync"
	"time"
)

// Output is where Stream writes the encoded samples. Open is called once
// before the first write with the bytes that start every connection (the
// text header); Disconnect and Reconnect play a scripted disconnection.
// Close may be called more than once and from another goroutine, to unblock
// a write when the stream is cancelled.
type Output interface {
	Open(ctx context.Context, header []byte) error
	Write(p []byte) error
	Disconnect() error
	Reconnect(ctx context.Context) error
	Close() error
	// MaxWrite is the largest write that must stay whole (a datagram), or
	// zero when writes may be of any size.
	MaxWrite() int
}

// OutputOptions configure ParseOutput.
type OutputOptions struct {
	// Stdout is the writer of "-" (os.Stdout when nil).
	Stdout io.Writer
	// Link keeps a symbolic link at this path to the current pseudo
	// terminal (pty output).
	Link string
	// OnStatus, when set, receives one line per notable change: the path of
	// a new pseudo terminal, the address a listener is bound to, a client
	// that connected or went away.
	OnStatus func(string)
	// OnPTY, when set, is called with the slave path of every pseudo
	// terminal the pty output opens (at the start and at each
	// reconnection), after the link points to it.
	OnPTY func(path string)
}

// ParseOutput returns the output named by spec: "-" (stdout), "pty",
// "tcp://host:port" (connect), "tcp-listen://host:port" (listen and serve
// every client), "udp://host:port", or a file path ("file://PATH" or PATH).
func ParseOutput(spec string, opts OutputOptions) (Output, error) {
	status := opts.OnStatus
	if status == nil {
		status = func(string) {}
	}
	scheme, rest, found := strings.Cut(spec, "://")
	switch {
	case spec == "-":
		w := opts.Stdout
		if w == nil {
			w = os.Stdout
		}
		return &writerOutput{w: w}, nil
	case spec == "pty":
		return &ptyOutput{link: opts.Link, status: status, onPTY: opts.OnPTY}, nil
	case !found:
		if spec == "" {
			return nil, errors.New("output: empty (want -, pty, tcp://, tcp-listen://, udp:// or a file path)")
		}
		return &fileOutput{path: spec}, nil
	}
	if opts.Link != "" {
		return nil, fmt.Errorf("output %s: a link needs the pty output", spec)
	}
	switch scheme {
	case "file":
		return &fileOutput{path: rest}, nil
	case "tcp", "tcp-listen", "udp":
		if _, _, err := net.SplitHostPort(rest); err != nil {
			return nil, fmt.Errorf("output %s: %w", spec, err)
		}
		switch scheme {
		case "tcp":
			return &tcpOutput{addr: rest, status: status}, nil
		case "tcp-listen":
			return &listenOutput{addr: rest, status: status}, nil
		default:
			return &udpOutput{addr: rest, status: status}, nil
		}
	}
	return nil, fmt.Errorf("output %s: unknown scheme %q (want -, pty, tcp://, tcp-listen://, udp:// or a file path)", spec, scheme)
}

// WriterOutput returns an output that writes to w (a buffer, a pipe): the
// stream as it would go to stdout. A disconnection shows only as a gap in
// the time stamps.
func WriterOutput(w io.Writer) Output { return &writerOutput{w: w} }

// writerOutput writes to an io.Writer (stdout). A disconnection shows only
// as a gap in the time stamps.
type writerOutput struct {
	w io.Writer
}

func (o *writerOutput) Open(_ context.Context, header []byte) error { return o.Write(header) }
func (o *writerOutput) Write(p []byte) error {
	if len(p) == 0 {
		return nil
	}
	_, err := o.w.Write(p)
	return err
}
func (o *writerOutput) Disconnect() error                 { return nil }
func (o *writerOutput) Reconnect(_ context.Context) error { return nil }
func (o *writerOutput) Close() error                      { return nil }
func (o *writerOutput) MaxWrite() int                     { return 0 }

// fileOutput writes a file, created or truncated. A disconnection shows
// only as a gap in the time stamps.
type fileOutput struct {
	path string
	mu   sync.Mutex
	f    *os.File
}

func (o *fileOutput) Open(_ context.Context, header []byte) error {
	f, err := os.Create(o.path)
	if err != nil {
		return fmt.Errorf("create %s: %w", o.path, err)
	}
	o.mu.Lock()
	o.f = f
	o.mu.Unlock()
	return o.Write(header)
}

func (o *fileOutput) Write(p []byte) error {
	if len(p) == 0 {
		return nil
	}
	o.mu.Lock()
	defer o.mu.Unlock()
	if o.f == nil {
		return fmt.Errorf("write %s: %w", o.path, os.ErrClosed)
	}
	if _, err := o.f.Write(p); err != nil {
		return fmt.Errorf("write %s: %w", o.path, err)
	}
	return nil
}

func (o *fileOutput) Disconnect() error                 { return nil }
func (o *fileOutput) Reconnect(_ context.Context) error { return nil }
func (o *fileOutput) MaxWrite() int                     { return 0 }
func (o *fileOutput) Close() error {
	o.mu.Lock()
	defer o.mu.Unlock()
	if o.f == nil {
		return nil
	}
	err := o.f.Close()
	o.f = nil
	if err != nil {
		return fmt.Errorf("close %s: %w", o.path, err)
	}
	return nil
}

// listenOutput listens and writes every sample to every connected client;
// each new client first gets the header. Open waits for the first client so
// that a run at full speed loses nothing. A client that cannot keep up for
// clientWriteTimeout is dropped. A scripted disconnection closes every
// client; clients that connect during it are closed at once.
type listenOutput struct {
	addr    string
	status  func(string)
	header  []byte
	ln      net.Listener
	mu      sync.Mutex
	clients map[net.Conn]struct{}
	down    bool
	first   chan struct{}
	wg      sync.WaitGroup
	once    sync.Once
}

// clientWriteTimeout bounds a write to one listening client.
const clientWriteTimeout = 2 * time.Second

// Addr returns the bound address once Open has been called (useful with
// port 0).
func (o *listenOutput) Addr() string {
	if o.ln == nil {
		return o.addr
	}
	return o.ln.Addr().String()
}

func (o *listenOutput) Open(ctx context.Context, header []byte) error {
	o.header = header
	var lc net.ListenConfig
	ln, err := lc.Listen(ctx, "tcp", o.addr)
	if err != nil {
		return fmt.Errorf("listen %s: %w", o.addr, err)
	}
	o.ln = ln
	o.clients = map[net.Conn]struct{}{}
	o.first = make(chan struct{})
	o.status("listening on " + ln.Addr().String())
	o.wg.Add(1)
	go o.accept()
	select {
	case <-o.first:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

func (o *listenOutput) accept() {
	defer o.wg.Done()
	firstSeen := false
	for {
		c, err := o.ln.Accept()
		if err != nil {
			return // closed
		}
		o.mu.Lock()
		if o.down {
			o.mu.Unlock()
			c.Close()
			continue
		}
		_ = c.SetWriteDeadline(time.Now().Add(clientWriteTimeout))
		if _, err := c.Write(o.header); err != nil {
			o.mu.Unlock()
			c.Close()
			continue
		}
		o.clients[c] = struct{}{}
		o.mu.Unlock()
		o.status("client " + c.RemoteAddr().String() + " connected")
		if !firstSeen {
			firstSeen = true
			close(o.first)
		}
	}
}

func (o *listenOutput) Write(p []byte) error {
	o.mu.Lock()
	defer o.mu.Unlock()
	for c := range o.clients {
		_ = c.SetWriteDeadline(time.Now().Add(clientWriteTimeout))
		if _, err := c.Write(p); err != nil {
			c.Close()
			delete(o.clients, c)
			o.status(fmt.Sprintf("client %s gone: %v", c.RemoteAddr(), err))
		}
	}
	return nil
}

func (o *listenOutput) Disconnect() error {
	o.mu.Lock()
	defer o.mu.Unlock()
	o.down = true
	for c := range o.clients {
		c.Close()
		delete(o.clients, c)
	}
	return nil
}

func (o *listenOutput) Reconnect(_ context.Context) error {
	o.mu.Lock()
	o.down = false
	o.mu.Unlock()
	return nil
}

func (o *listenOutput) Close() error {
	o.once.Do(func() {
		if o.ln == nil {
			return
		}
		o.ln.Close()
		o.wg.Wait()
		o.mu.Lock()
		for c := range o.clients {
			c.Close()
			delete(o.clients, c)
		}
		o.mu.Unlock()
	})
	return nil
}

func (o *listenOutput) MaxWrite() int { return 0 }

// udpOutput sends datagrams of whole lines or frames. Nothing is
// acknowledged: a missing reader loses the samples.
type udpOutput struct {
	addr   string
	status func(string)
	header []byte
	mu     sync.Mutex
	conn   net.Conn
	down   bool
}

// maxDatagram keeps datagrams under a typical Ethernet MTU.
const maxDatagram = 1200

func (o *udpOutput) Open(ctx context.Context, header []byte) error {
	o.header = header
	var d net.Dialer
	c, err := d.DialContext(ctx, "udp", o.addr)
	if err != nil {
		return fmt.Errorf("udp %s: %w", o.addr, err)
	}
	o.mu.Lock()
	o.conn = c
	o.mu.Unlock()
	return o.Write(header)
}

func (o *udpOutput) Write(p []byte) error {
	o.mu.Lock()
	c, down := o.conn, o.down
	o.mu.Unlock()
	if c == nil {
		return net.ErrClosed
	}
	if down || len(p) == 0 {
		return nil
	}
	// A refused datagram (no reader yet) is a lost one, not a failure.
	_, _ = c.Write(p)
	return nil
}

func (o *udpOutput) Disconnect() error {
	o.mu.Lock()
	o.down = true
	o.mu.Unlock()
	return nil
}

func (o *udpOutput) Reconnect(_ context.Context) error {
	o.mu.Lock()
	o.down = false
	o.mu.Unlock()
	return o.Write(o.header)
}

func (o *udpOutput) Close() error {
	o.mu.Lock()
	c := o.conn
	o.conn = nil
	o.mu.Unlock()
	if c != nil {
		return c.Close()
	}
	return nil
}

func (o *udpOutput) MaxWrite() int { return maxDatagram }
