package ingest

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"os"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"trapline/ingest/backoff"
)

// ErrNoData explains a StatusDisconnected sent when a live source has read
// nothing for Options.Silence although its device or connection is open.
var ErrNoData = errors.New("no data")

// Options configure a source. URL query parameters override the matching
// fields (format, rate, stream, columns).
type Options struct {
	// Stream is the stream id of samples that name none (DefaultStream when
	// empty).
	Stream string
	// Format is the wire format when the URL gives none; empty means text,
	// or binary for nats subjects.
	Format Format
	// Columns is the text layout of input without a header.
	Columns string
	// RateHz is the declared sample rate: the time of samples without a time
	// column, and the period against which gaps and drift are measured.
	RateHz float64
	// Log receives the source's warnings (rate-limited) and debug detail;
	// nil logs nothing.
	Log *zerolog.Logger
	// NATS is the connection that nats: sources subscribe with; the source
	// never closes it.
	NATS *nats.Conn
	// Stdin is what the stdin source reads; nil means os.Stdin.
	Stdin io.Reader
	// Buffer is the number of events (batches of up to 256 samples, or
	// status changes) held between the reader and the sink; 0 means 256.
	Buffer int
	// Overload is the policy when the buffer is full.
	Overload OverloadPolicy
	// BackoffMin and BackoffMax bound the wait between attempts to reopen a
	// device or connection; the wait doubles from BackoffMin up to
	// BackoffMax. Zero means 100 ms and 5 s (1 s for serial devices, which
	// are cheap to try).
	BackoffMin, BackoffMax time.Duration
	// Silence is how long a live source may read nothing before it reports
	// StatusDisconnected with ErrNoData; 0 means 3 s, negative disables it.
	Silence time.Duration
	// Tap, when not nil, receives every byte read before it is decoded,
	// and every reset and end of input (for recording).
	Tap Tap
}

// Open parses a source URL (see ParseURL) and returns the source. It checks
// everything that can be checked without touching the device or network,
// so that a configuration error shows at start-up; the device itself is
// opened by Run.
//
// Typical use by a caller (the daemon, `trapline analyze`):
//
//	src, err := ingest.Open("serial:///dev/ttyUSB0?baud=115200", ingest.Options{Stream: "bed-4", Log: &log})
//	if err != nil { ... }
//	err = src.Run(ctx, func(ev ingest.Event) { ... })
func Open(rawURL string, opts Options) (Source, error) {
	spec, err := ParseURL(rawURL)
	if err != nil {
		return nil, err
	}
	return OpenSpec(spec, opts)
}

// OpenSpec is Open for a parsed URL.
func OpenSpec(spec Spec, opts Options) (Source, error) {
	if spec.Stream != "" {
		opts.Stream = spec.Stream
	}
	if opts.Stream == "" {
		opts.Stream = DefaultStream
	}
	if spec.Columns != "" {
		opts.Columns = spec.Columns
	}
	if spec.RateHz > 0 {
		opts.RateHz = spec.RateHz
	}
	switch {
	case spec.Format != "":
		opts.Format = spec.Format
	case opts.Format != "":
		if _, err := ParseFormat(string(opts.Format)); err != nil {
			return nil, fmt.Errorf("source %s: %w", spec, err)
		}
	case spec.Scheme == "nats":
		opts.Format = FormatBinary // the scale-out subjects carry binary frames
	default:
		opts.Format = FormatText
	}
	if spec.Scheme == "nats" && opts.NATS == nil {
		return nil, fmt.Errorf("source %s: a nats subject needs a NATS connection", spec)
	}
	if opts.Buffer <= 0 {
		opts.Buffer = 256
	}
	if opts.BackoffMin <= 0 {
		opts.BackoffMin = 100 * time.Millisecond
	}
	if opts.BackoffMax <= 0 {
		opts.BackoffMax = 5 * time.Second
		if spec.Scheme == "serial" {
			opts.BackoffMax = time.Second
		}
	}
	opts.BackoffMax = max(opts.BackoffMax, opts.BackoffMin)
	if opts.Silence == 0 {
		opts.Silence = 3 * time.Second
	}
	opts.Overload = opts.Overload.For(spec.Scheme)
	if opts.Stdin == nil {
		opts.Stdin = os.Stdin
	}
	log := zerolog.Nop()
	if opts.Log != nil {
		log = *opts.Log
	}
	s := &source{spec: spec, opts: opts, tls: map[string]*timeline{}}
	s.log = log.With().Str("source", spec.String()).Logger()
	// Fail now on options the decoder refuses (a bad columns spec).
	if _, err := NewDecoder(opts.Format, s.decoderOptions(opts.Stream), nil); err != nil {
		return nil, fmt.Errorf("source %s: %w", spec, err)
	}
	return s, nil
}

// source is every kind of source: what differs is the read loop of its
// scheme; decoding, timing, buffering and counting are shared.
type source struct {
	spec Spec
	opts Options
	log  zerolog.Logger

	c counters

	mu      sync.Mutex // guards tls and the pending batches of every conn
	tls     map[string]*timeline
	q       *queue
	running atomic.Bool

	addr atomic.Pointer[string] // listening address of tcp-listen and udp

	warnMu   sync.Mutex
	lastWarn map[string]time.Time
}

// counters are the source's Stats, updated atomically.
type counters struct {
	samples, badLines, badFrames, skipped, gaps, dups, ooo, dropped, reconnects, resets, drift atomic.Uint64
}

// Stats returns the counters so far.
func (s *source) Stats() Stats {
	c := &s.c
	return Stats{
		Samples: c.samples.Load(), BadLines: c.badLines.Load(), BadFrames: c.badFrames.Load(),
		SkippedBytes: c.skipped.Load(), Gaps: c.gaps.Load(), Duplicates: c.dups.Load(),
		OutOfOrder: c.ooo.Load(), Dropped: c.dropped.Load(), Reconnects: c.reconnects.Load(),
		ClockResets: c.resets.Load(), RateDrifts: c.drift.Load(),
	}
}

// Addr returns the address a tcp-listen or udp source listens on once Run
// has bound it (useful with port 0), or "" before and for other schemes.
func (s *source) Addr() string {
	if a := s.addr.Load(); a != nil {
		return *a
	}
	return ""
}

// Listener is implemented by the tcp-listen and udp sources.
type Listener interface {
	// Addr returns the bound address, or "" until Run has bound it.
	Addr() string
}

var _ Listener = (*source)(nil)

func (s *source) decoderOptions(stream string) DecoderOptions {
	return DecoderOptions{Columns: s.opts.Columns, RateHz: s.opts.RateHz, Stream: stream}
}

// warn logs at warning level at most once per 10 s for a key.
func (s *source) warn(key string, f func(*zerolog.Event)) {
	s.warnMu.Lock()
	now := time.Now()
	if s.lastWarn == nil {
		s.lastWarn = map[string]time.Time{}
	}
	if t, ok := s.lastWarn[key]; ok && now.Sub(t) < 10*time.Second {
		s.warnMu.Unlock()
		return
	}
	s.lastWarn[key] = now
	s.warnMu.Unlock()
	f(s.log.Warn())
}

// Run reads until ctx is cancelled or a finite input (file, stdin) ends,
// delivering events to sink from the calling goroutine. It returns nil on
// cancellation and at the end of a finite input, and an error when the
// source cannot work at all (a missing file, a port already in use).
func (s *source) Run(ctx context.Context, sink Sink) error {
	if !s.running.CompareAndSwap(false, true) {
		return errors.New("source is already running")
	}
	defer s.running.Store(false)
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	var ep dropEpisode
	s.q = newQueue(s.opts.Buffer, s.opts.Overload, func(n int, _ bool) {
		s.c.dropped.Add(uint64(n))
		ep.drop(n, time.Now(), s.log, s.opts.Overload.String())
	})
	readErr := make(chan error, 1)
	go func() {
		err := s.read(ctx)
		if ctx.Err() != nil {
			err = nil
		}
		s.q.close()
		readErr <- err
	}()
	for {
		e, gapS, ok := s.q.pop(ctx)
		if !ok {
			break
		}
		if gapS > 0 {
			// Samples of this stream were dropped under overload: the sink
			// sees the hole as a gap.
			s.c.gaps.Add(1)
			sink(Event{Stream: e.ev.Stream, Status: StatusGap, GapS: gapS})
		}
		s.c.samples.Add(uint64(len(e.ev.Samples)))
		sink(e.ev)
		putBatch(e.buf)
		if ep.open.Load() {
			ep.check(time.Now(), s.log)
		}
	}
	cancel()
	return <-readErr
}

// read runs the read loop of the scheme.
func (s *source) read(ctx context.Context) error {
	switch s.spec.Scheme {
	case "file":
		return s.readFile(ctx)
	case "stdin":
		return s.readStdin(ctx)
	case "tcp":
		return s.readTCP(ctx)
	case "tcp-listen":
		return s.readTCPListen(ctx)
	case "udp":
		return s.readUDP(ctx)
	case "serial":
		return s.readSerial(ctx)
	case "nats":
		return s.readNATS(ctx)
	}
	return fmt.Errorf("scheme %q has no reader", s.spec.Scheme)
}

// conn is one byte stream being decoded: a file, a connection, a serial
// device across its reopenings, the datagrams of one peer or the messages
// of one subject.
type conn struct {
	s         *source
	ctx       context.Context
	dec       Decoder
	defStream string
	seen      []string             // streams read from this conn, for status events
	pending   map[string]*[]Sample // samples waiting to be pushed, per stream
	order     []string             // streams with pending samples
	prev      DecoderStats
	lastErr   error
	pace      *pacer
	silent    bool
	lastData  time.Time
}

func (s *source) newConn(ctx context.Context, defStream string) *conn {
	c := &conn{s: s, ctx: ctx, defStream: defStream, pending: map[string]*[]Sample{}, lastData: time.Now()}
	// Options were checked by OpenSpec; defStream is built from a valid id.
	d, err := NewDecoder(s.opts.Format, s.decoderOptions(defStream), c.emit)
	if err != nil {
		d, _ = NewDecoder(s.opts.Format, s.decoderOptions(DefaultStream), c.emit)
	}
	c.dec = d
	if s.spec.Realtime {
		c.pace = &pacer{speed: s.spec.Speed}
	}
	return c
}

// write decodes p and pushes the resulting events.
func (c *conn) write(p []byte) {
	c.lastData = time.Now()
	if c.silent {
		c.silent = false
		c.status(StatusConnected, nil)
	}
	c.tap(TapData, p)
	c.s.mu.Lock()
	defer c.s.mu.Unlock()
	_, _ = c.dec.Write(p)
	c.flushAll()
	c.count()
}

// end decodes what is left at the end of the input.
func (c *conn) end() {
	c.tap(TapEnd, nil)
	c.s.mu.Lock()
	defer c.s.mu.Unlock()
	c.dec.Flush()
	c.flushAll()
	c.count()
}

// reset drops a partial line or frame when the link went down.
func (c *conn) reset() {
	c.tap(TapReset, nil)
	c.s.mu.Lock()
	defer c.s.mu.Unlock()
	c.dec.Reset()
	c.flushAll()
	c.count()
}

// count moves the decoder's counters into the source's.
func (c *conn) count() {
	st := c.dec.Stats()
	s := c.s
	if d := st.BadLines - c.prev.BadLines; d > 0 {
		s.c.badLines.Add(d)
		s.warn("bad-lines", func(e *zerolog.Event) {
			e.Uint64("bad_lines", s.c.badLines.Load()).Msg("text lines that do not parse are skipped")
		})
	}
	if d := st.BadFrames - c.prev.BadFrames; d > 0 {
		s.c.badFrames.Add(d)
		s.warn("bad-frames", func(e *zerolog.Event) {
			e.Uint64("bad_frames", s.c.badFrames.Load()).Uint64("skipped_bytes", s.c.skipped.Load()).
				Msg("corrupt binary input is skipped")
		})
	}
	s.c.skipped.Add(st.SkippedBytes - c.prev.SkippedBytes)
	c.prev = st
	if err := c.dec.Err(); err != nil && (c.lastErr == nil || err.Error() != c.lastErr.Error()) {
		s.log.Warn().Err(err).Msg("input header cannot be used: samples are rejected until a valid header arrives")
	}
	c.lastErr = c.dec.Err()
}

// emit is the decoder's callback; it runs with s.mu held.
func (c *conn) emit(stream string, smp Sample) {
	s := c.s
	tl := s.tls[stream]
	if tl == nil {
		tl = newTimeline(s.opts.RateHz)
		s.tls[stream] = tl
	}
	if !containsStr(c.seen, stream) && len(c.seen) < maxStreams {
		c.seen = append(c.seen, stream)
	}
	out, v, gapS, drift := tl.admit(smp.TimeS)
	switch v {
	case duplicate:
		s.c.dups.Add(1)
		s.log.Debug().Str("stream", stream).Float64("t_s", smp.TimeS).Msg("duplicate sample dropped")
		return
	case outOfOrder:
		s.c.ooo.Add(1)
		s.log.Debug().Str("stream", stream).Float64("t_s", smp.TimeS).Msg("out-of-order sample dropped")
		return
	case keepAfterGap:
		c.flush(stream)
		s.c.gaps.Add(1)
		s.log.Debug().Str("stream", stream).Float64("gap_s", gapS).Msg("gap in sample times")
		c.push(Event{Stream: stream, Status: StatusGap, GapS: gapS}, nil)
	case keepAfterReset:
		c.flush(stream)
		s.c.resets.Add(1)
		s.warn("reset-"+stream, func(e *zerolog.Event) {
			e.Str("stream", stream).Msg("device time went back: continuing after a gap of unknown length")
		})
		c.push(Event{Stream: stream, Status: StatusGap, Err: ErrClockReset}, nil)
	}
	if drift {
		s.c.drift.Add(1)
		s.warn("drift-"+stream, func(e *zerolog.Event) {
			e.Str("stream", stream).Float64("period_s", tl.periodS).Float64("mean_interval_s", tl.meanS).
				Msg("sample rate drifts from the declared or first measured rate")
		})
	}
	smp.TimeS = out
	b := c.pending[stream]
	if b == nil {
		b = getBatch()
		c.pending[stream] = b
		c.order = append(c.order, stream)
	}
	*b = append(*b, smp)
	if len(*b) >= batchSamples || c.pace != nil && out-(*b)[0].TimeS >= 0.02 {
		c.flush(stream)
	}
}

func containsStr(l []string, s string) bool {
	for _, x := range l {
		if x == s {
			return true
		}
	}
	return false
}

// flush pushes the pending samples of one stream.
func (c *conn) flush(stream string) {
	b := c.pending[stream]
	if b == nil {
		return
	}
	delete(c.pending, stream)
	for i, x := range c.order {
		if x == stream {
			c.order = append(c.order[:i], c.order[i+1:]...)
			break
		}
	}
	if len(*b) == 0 {
		putBatch(b)
		return
	}
	if c.pace != nil {
		c.pace.wait(c.ctx, (*b)[0].TimeS)
	}
	c.push(Event{Stream: stream, Samples: *b}, b)
}

func (c *conn) flushAll() {
	for len(c.order) > 0 {
		c.flush(c.order[0])
	}
}

func (c *conn) push(e Event, buf *[]Sample) {
	_ = c.s.q.push(c.ctx, queued{ev: e, buf: buf})
}

// status reports a change of the link for every stream read through it
// (the default stream before any was read).
func (c *conn) status(st Status, err error) {
	c.s.mu.Lock()
	defer c.s.mu.Unlock()
	c.flushAll()
	streams := c.seen
	if len(streams) == 0 {
		streams = []string{c.defStream}
	}
	for _, id := range streams {
		c.push(Event{Stream: id, Status: st, Err: err}, nil)
	}
}

// checkSilence reports StatusDisconnected with ErrNoData once the link has
// been quiet for Options.Silence.
func (c *conn) checkSilence() {
	if c.s.opts.Silence < 0 || c.silent || time.Since(c.lastData) < c.s.opts.Silence {
		return
	}
	c.silent = true
	c.s.warn("silence", func(e *zerolog.Event) {
		e.Dur("silence", c.s.opts.Silence).Msg("no data: reporting the signal as lost")
	})
	c.status(StatusDisconnected, fmt.Errorf("%w for %v", ErrNoData, c.s.opts.Silence))
}

// pacer holds a file's samples back to the pace of their time stamps.
type pacer struct {
	speed  float64
	start  time.Time
	firstS float64
	set    bool
}

func (p *pacer) wait(ctx context.Context, tS float64) {
	if !p.set {
		p.start, p.firstS, p.set = time.Now(), tS, true
		return
	}
	due := p.start.Add(time.Duration((tS - p.firstS) / p.speed * float64(time.Second)))
	d := time.Until(due)
	if d <= 0 {
		return
	}
	backoff.Sleep(ctx, nil, d)
}

// readChunk is the buffer size of stream reads.
const readChunk = 32 << 10

// pump reads r until it fails and decodes what it reads. It returns the
// read error (io.EOF at the end of a file). deadline, when not nil, is set
// before each read so that a quiet link still returns to the loop after a
// read that timed out.
func (c *conn) pump(r io.Reader, deadline func(time.Time) error) error {
	buf := make([]byte, readChunk)
	for {
		if c.ctx.Err() != nil {
			return c.ctx.Err()
		}
		if deadline != nil {
			_ = deadline(time.Now().Add(250 * time.Millisecond))
		}
		n, err := r.Read(buf)
		if n > 0 {
			c.write(buf[:n])
		}
		if err != nil {
			var ne net.Error
			if errors.As(err, &ne) && ne.Timeout() {
				c.checkSilence()
				continue
			}
			return err
		}
		if n == 0 {
			c.checkSilence()
		}
	}
}

// streamFor returns the default stream of the n-th client of tcp-listen in
// per-client mode: the configured id with "-<n>", cut to the longest id.
func streamFor(base string, n uint64) string {
	suffix := fmt.Sprintf("-%d", n)
	return base[:min(len(base), maxStreamID-len(suffix))] + suffix
}
