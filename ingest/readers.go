package ingest

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

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"
	"go.bug.st/serial"

	"trapline/ingest/backoff"
)

// readFile reads a file to its end. A file that cannot be opened stops the
// source: it will not appear by retrying.
func (s *source) readFile(ctx context.Context) error {
	f, err := os.Open(s.spec.Address)
	if err != nil {
		return fmt.Errorf("open %s: %w", s.spec.Address, err)
	}
	defer f.Close()
	c := s.newConn(ctx, s.opts.Stream)
	if err := c.pump(f, nil); !errors.Is(err, io.EOF) {
		if ctx.Err() != nil {
			return nil
		}
		return fmt.Errorf("read %s: %w", s.spec.Address, err)
	}
	c.end()
	return nil
}

// readStdin reads standard input to its end. A read blocked on a terminal
// or pipe cannot be interrupted: on cancellation Run returns at once and
// the reading goroutine ends at the next read that returns.
func (s *source) readStdin(ctx context.Context) error {
	c := s.newConn(ctx, s.opts.Stream)
	type chunk struct {
		b   []byte
		err error
	}
	ch := make(chan chunk)
	free := make(chan []byte, 2)
	free <- make([]byte, readChunk)
	free <- make([]byte, readChunk)
	go func() {
		for {
			var b []byte
			select {
			case b = <-free:
			case <-ctx.Done():
				return
			}
			n, err := s.opts.Stdin.Read(b)
			select {
			case ch <- chunk{b[:n], err}:
			case <-ctx.Done():
				return
			}
			if err != nil {
				return
			}
		}
	}()
	for {
		select {
		case <-ctx.Done():
			return nil
		case k := <-ch:
			if len(k.b) > 0 {
				c.write(k.b)
			}
			free <- k.b[:cap(k.b)]
			if errors.Is(k.err, io.EOF) {
				c.end()
				return nil
			}
			if k.err != nil {
				return fmt.Errorf("read stdin: %w", k.err)
			}
		}
	}
}

// readTCP connects to a server and reconnects with capped exponential
// backoff whenever the connection fails or ends.
func (s *source) readTCP(ctx context.Context) error {
	c := s.newConn(ctx, s.opts.Stream)
	b := backoff.Backoff{Min: s.opts.BackoffMin, Max: s.opts.BackoffMax, Jitter: 0.2}
	up, everUp := true, false // report the first failure as a disconnection
	for ctx.Err() == nil {
		d := net.Dialer{Timeout: 5 * time.Second}
		nc, err := d.DialContext(ctx, "tcp", s.spec.Address)
		if err != nil {
			if ctx.Err() != nil {
				break
			}
			if up {
				up = false
				c.status(StatusDisconnected, fmt.Errorf("connect %s: %w", s.spec.Address, err))
			}
			s.warn("connect", func(e *zerolog.Event) { e.Err(err).Msg("cannot connect: retrying with backoff") })
			if !b.Wait(ctx) {
				break
			}
			continue
		}
		if everUp {
			s.c.reconnects.Add(1)
		}
		everUp, up = true, true
		s.log.Info().Msg("connected")
		c.status(StatusConnected, nil)
		c.lastData, c.silent = time.Now(), false
		stop := context.AfterFunc(ctx, func() { nc.Close() })
		start := time.Now()
		err = c.pump(nc, nc.SetReadDeadline)
		stop()
		nc.Close()
		c.reset()
		if ctx.Err() != nil {
			break
		}
		if err == nil || errors.Is(err, io.EOF) {
			err = io.ErrUnexpectedEOF
		}
		up = false
		c.status(StatusDisconnected, fmt.Errorf("read %s: %w", s.spec.Address, err))
		s.warn("read", func(e *zerolog.Event) { e.Err(err).Msg("connection lost: reconnecting") })
		if time.Since(start) > s.opts.BackoffMax {
			b.Reset() // it was up for a while: start again from a short wait
		}
		if !b.Wait(ctx) {
			break
		}
	}
	return nil
}

// readTCPListen accepts clients on a loopback (by default) port; each
// client's bytes are decoded on their own.
func (s *source) readTCPListen(ctx context.Context) error {
	var lc net.ListenConfig
	ln, err := lc.Listen(ctx, "tcp", s.spec.Address)
	if err != nil {
		return fmt.Errorf("listen %s: %w", s.spec.Address, err)
	}
	addr := ln.Addr().String()
	s.addr.Store(&addr)
	s.log.Info().Str("addr", addr).Msg("listening")
	stop := context.AfterFunc(ctx, func() { ln.Close() })
	defer stop()
	var wg sync.WaitGroup
	defer wg.Wait()
	var mu sync.Mutex
	active := 0
	var n uint64
	for {
		nc, err := ln.Accept()
		if err != nil {
			if ctx.Err() != nil {
				return nil
			}
			var ne net.Error
			if errors.As(err, &ne) && ne.Timeout() {
				continue
			}
			ln.Close()
			return fmt.Errorf("accept on %s: %w", addr, err)
		}
		mu.Lock()
		if active >= s.spec.MaxClients {
			mu.Unlock()
			s.warn("max-clients", func(e *zerolog.Event) {
				e.Int("max_clients", s.spec.MaxClients).Str("peer", nc.RemoteAddr().String()).Msg("client refused")
			})
			nc.Close()
			continue
		}
		active++
		n++
		id := n
		mu.Unlock()
		wg.Add(1)
		go func() {
			defer wg.Done()
			defer func() { mu.Lock(); active--; mu.Unlock() }()
			def := s.opts.Stream
			if s.spec.PerClient {
				def = streamFor(def, id)
			}
			s.serveClient(ctx, nc, def)
		}()
	}
}

func (s *source) serveClient(ctx context.Context, nc net.Conn, stream string) {
	stop := context.AfterFunc(ctx, func() { nc.Close() })
	defer stop()
	defer nc.Close()
	peer := nc.RemoteAddr().String()
	s.log.Info().Str("peer", peer).Str("stream", stream).Msg("client connected")
	c := s.newConn(ctx, stream)
	c.status(StatusConnected, nil)
	err := c.pump(nc, nc.SetReadDeadline)
	c.end()
	if ctx.Err() != nil {
		return
	}
	if err == nil || errors.Is(err, io.EOF) {
		err = io.ErrUnexpectedEOF
	}
	s.log.Info().Str("peer", peer).Err(err).Msg("client gone")
	c.status(StatusDisconnected, fmt.Errorf("client %s: %w", peer, err))
}

// maxPeers bounds the decoders a udp source keeps, one per sender.
const maxPeers = 64

// readUDP decodes datagrams; each datagram holds whole lines or frames.
func (s *source) readUDP(ctx context.Context) error {
	var lc net.ListenConfig
	pc, err := lc.ListenPacket(ctx, "udp", s.spec.Address)
	if err != nil {
		return fmt.Errorf("listen %s: %w", s.spec.Address, err)
	}
	addr := pc.LocalAddr().String()
	s.addr.Store(&addr)
	stop := context.AfterFunc(ctx, func() { pc.Close() })
	defer stop()
	defer pc.Close()
	peers := map[string]*conn{}
	idle := s.newConn(ctx, s.opts.Stream) // reports silence when no peer sends
	buf := make([]byte, 64<<10)
	for {
		_ = pc.SetReadDeadline(time.Now().Add(250 * time.Millisecond))
		n, from, err := pc.ReadFrom(buf)
		if ctx.Err() != nil {
			return nil
		}
		if err != nil {
			var ne net.Error
			if errors.As(err, &ne) && ne.Timeout() {
				if time.Since(idle.lastData) >= s.opts.Silence {
					// Every peer is quiet: report it on every stream seen.
					for _, c := range peers {
						c.checkSilence()
					}
					if len(peers) == 0 {
						idle.checkSilence()
					}
				}
				continue
			}
			return fmt.Errorf("read %s: %w", addr, err)
		}
		key := from.String()
		c := peers[key]
		if c == nil {
			if len(peers) >= maxPeers {
				clear(peers)
			}
			c = s.newConn(ctx, s.opts.Stream)
			peers[key] = c
		}
		idle.lastData = time.Now()
		c.write(buf[:n])
		c.end()
	}
}

// serialReadTimeout is how long a serial read waits before it returns with
// no data, so that the loop sees cancellation and silence.
const serialReadTimeout = 100 * time.Millisecond

// readSerial reads a serial device and reopens it by path, with backoff,
// whenever it fails (a cable pulled): the path or symlink may lead to a new
// device when it comes back.
func (s *source) readSerial(ctx context.Context) error {
	c := s.newConn(ctx, s.opts.Stream)
	b := backoff.Backoff{Min: s.opts.BackoffMin, Max: s.opts.BackoffMax, Jitter: 0.2}
	up, everUp := true, false
	path := s.spec.Address
	for ctx.Err() == nil {
		port, err := serial.Open(path, &serial.Mode{BaudRate: s.spec.Baud})
		if err == nil {
			if err = port.SetReadTimeout(serialReadTimeout); err != nil {
				port.Close()
			}
		}
		if err != nil {
			if up {
				up = false
				c.status(StatusDisconnected, fmt.Errorf("open serial %s: %w", path, err))
			}
			s.warn("open", func(e *zerolog.Event) { e.Err(err).Msg("cannot open serial device: retrying with backoff") })
			if !b.Wait(ctx) {
				break
			}
			continue
		}
		if everUp {
			s.c.reconnects.Add(1)
		}
		everUp, up = true, true
		b.Reset()
		s.log.Info().Int("baud", s.spec.Baud).Msg("serial device open")
		c.status(StatusConnected, nil)
		c.lastData, c.silent = time.Now(), false
		// A read with no data returns n == 0 and no error after the read
		// timeout ("quiet line"); pump counts it toward silence. Any error
		// means the device is gone.
		err = c.pump(port, nil)
		port.Close()
		c.reset()
		if ctx.Err() != nil {
			break
		}
		up = false
		c.status(StatusDisconnected, fmt.Errorf("read serial %s: %w", path, err))
		s.warn("read", func(e *zerolog.Event) { e.Err(err).Msg("serial device lost: reopening") })
		if !b.Wait(ctx) {
			break
		}
	}
	return nil
}

// maxSubjects bounds the decoders a nats source keeps, one per subject.
const maxSubjects = 1024

// readNATS subscribes to a subject; each message holds whole frames (or
// lines) of the stream named by the subject's last token.
func (s *source) readNATS(ctx context.Context) error {
	nc := s.opts.NATS
	conns := map[string]*conn{}
	var mu sync.Mutex // nats calls the handler from one goroutine, the ticker from another
	lastData := time.Now()
	handler := func(m *nats.Msg) {
		mu.Lock()
		defer mu.Unlock()
		c := conns[m.Subject]
		if c == nil {
			if len(conns) >= maxSubjects {
				clear(conns)
			}
			def := s.opts.Stream
			if i := strings.LastIndexByte(m.Subject, '.'); ValidStreamID(m.Subject[i+1:]) {
				def = m.Subject[i+1:]
			}
			c = s.newConn(ctx, def)
			conns[m.Subject] = c
		}
		lastData = time.Now()
		c.write(m.Data)
		c.end()
	}
	sub, err := nc.Subscribe(s.spec.Address, handler)
	if err != nil {
		return fmt.Errorf("subscribe %s: %w", s.spec.Address, err)
	}
	defer sub.Unsubscribe()
	link := s.newConn(ctx, s.opts.Stream) // status of the NATS link itself
	connected := nc.IsConnected()
	if connected {
		link.status(StatusConnected, nil)
	}
	tick := time.NewTicker(250 * time.Millisecond)
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case <-tick.C:
		}
		if now := nc.IsConnected(); now != connected {
			connected = now
			st, why := StatusConnected, error(nil)
			if !now {
				st, why = StatusDisconnected, fmt.Errorf("nats connection %s", nc.Status())
				s.log.Warn().Str("status", nc.Status().String()).Msg("NATS connection lost")
			} else {
				s.c.reconnects.Add(1)
			}
			mu.Lock()
			link.seen = link.seen[:0]
			for _, c := range conns {
				link.seen = append(link.seen, c.seen...)
			}
			mu.Unlock()
			link.status(st, why)
		}
		mu.Lock()
		quiet := time.Since(lastData) >= s.opts.Silence && s.opts.Silence > 0
		if quiet {
			for _, c := range conns {
				c.checkSilence()
			}
			if len(conns) == 0 {
				link.checkSilence()
			}
		}
		mu.Unlock()
	}
}
