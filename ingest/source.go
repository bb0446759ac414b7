package ingest

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"
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
	// Direct, when not nil, replaces the sink of Run: the events of each
	// read go to it on the reading goroutine, with no buffer and no
	// hand-off in between (Buffer and Overload are then unused; the
	// sink decides). A tcp-listen source calls it from each client's
	// goroutine, so it must be safe for concurrent use.
	Direct BatchSink
	// Hold, when positive, lets a connection read by a network stream
	// (tcp, tcp-listen) keep what it reads for up to this long and decode
	// it together, rather than read by read. A live sender writes every few
	// milliseconds, so each read brings one sample of each of its streams;
	// held for 50 ms, every stream's state is visited once for five samples
	// instead of five times, which is most of what carrying thousands of
	// streams costs (docs/operations.md). It delays every sample by at most
	// Hold. 0 decodes each read at once.
	Hold time.Duration
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
// delivering events to sink from the calling goroutine (or to
// Options.Direct from the reading goroutines, sink then unused). It returns nil on
// cancellation and at the end of a finite input, and an error when the
// source cannot work at all (a missing file, a port already in use).
func (s *source) Run(ctx context.Context, sink Sink) error {
	if !s.running.CompareAndSwap(false, true) {
		return errors.New("source is already running")
	}
	defer s.running.Store(false)
	if s.opts.Direct != nil {
		if err := s.read(ctx); err != nil && ctx.Err() == nil {
			return err
		}
		return nil
	}
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
