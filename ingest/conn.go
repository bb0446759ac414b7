package ingest

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"time"

	"github.com/rs/zerolog"

	"trapline/ingest/backoff"
)

// conn is one byte stream being decoded: a file, a connection, a serial
// device across its reopenings, the datagrams of one peer or the messages
// of one subject.
type conn struct {
	s         *source
	ctx       context.Context
	dec       Decoder
	defStream string
	seen      []string                 // streams read from this conn, for status events
	streams   StreamIndex[*connStream] // per stream read from this conn
	order     []*connStream            // streams with pending samples, in order
	prev      DecoderStats
	lastErr   error
	pace      *pacer
	silent    bool
	lastData  time.Time
	out       []Event // events of the last read, for Options.Direct
}

func (s *source) newConn(ctx context.Context, defStream string) *conn {
	c := &conn{s: s, ctx: ctx, defStream: defStream, lastData: time.Now()}
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
	_, _ = c.dec.Write(p)
	c.flushAll()
	c.count()
	c.s.mu.Unlock()
	c.deliver()
}

// end decodes what is left at the end of the input.
func (c *conn) end() {
	c.tap(TapEnd, nil)
	c.s.mu.Lock()
	c.dec.Flush()
	c.flushAll()
	c.count()
	c.s.mu.Unlock()
	c.deliver()
}

// reset drops a partial line or frame when the link went down.
func (c *conn) reset() {
	c.tap(TapReset, nil)
	c.s.mu.Lock()
	c.dec.Reset()
	c.flushAll()
	c.count()
	c.s.mu.Unlock()
	c.deliver()
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

// connStream is what a conn keeps of one stream: its timeline (shared by
// every conn of the source), its samples waiting to be pushed and the
// BatchSink's slot. One lookup per sample (conn.stream) finds them all.
type connStream struct {
	id      string
	tl      *timeline
	pending *[]Sample
	slot    StreamSlot // the BatchSink's, carried by this stream's events
}

// stream returns the state of a stream on this conn, making it on its
// first sample.
func (c *conn) stream(id string) *connStream {
	// A link of many streams repeats their order: StreamIndex finds the
	// stream after the last one without hashing its id.
	if cs, ok := c.streams.Get(id); ok {
		return cs
	}
	s := c.s
	tl := s.tls[id]
	if tl == nil {
		tl = newTimeline(s.opts.RateHz)
		s.tls[id] = tl
	}
	if len(c.seen) < maxStreams {
		c.seen = append(c.seen, id)
	}
	cs := &connStream{id: id, tl: tl}
	c.streams.Put(id, cs)
	return cs
}

// emit is the decoder's callback; it runs with s.mu held.
func (c *conn) emit(stream string, smp Sample) {
	s := c.s
	cs := c.stream(stream)
	tl := cs.tl
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
		c.flush(cs)
		s.c.gaps.Add(1)
		s.log.Debug().Str("stream", stream).Float64("gap_s", gapS).Msg("gap in sample times")
		c.push(Event{Stream: stream, Status: StatusGap, GapS: gapS}, nil)
	case keepAfterReset:
		c.flush(cs)
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
	b := cs.pending
	if b == nil && s.opts.Direct != nil {
		b = getSmallBatch()
		cs.pending = b
		c.order = append(c.order, cs)
	} else if b == nil {
		b = getBatch()
		cs.pending = b
		c.order = append(c.order, cs)
	}
	*b = append(*b, smp)
	if len(*b) >= batchSamples || c.pace != nil && out-(*b)[0].TimeS >= 0.02 {
		c.flush(cs)
	}
}

// flush pushes the pending samples of one stream. Its place in c.order is
// left behind and skipped by flushAll.
func (c *conn) flush(cs *connStream) {
	b := cs.pending
	if b == nil {
		return
	}
	cs.pending = nil
	stream := cs.id
	if len(*b) == 0 {
		putBatch(b)
		return
	}
	if c.pace != nil {
		c.pace.wait(c.ctx, (*b)[0].TimeS)
	}
	c.push(Event{Stream: stream, Samples: *b, Slot: &cs.slot}, b)
}

func (c *conn) flushAll() {
	// flush may wait (pacing) but never appends to c.order.
	for _, cs := range c.order {
		c.flush(cs)
	}
	clear(c.order)
	c.order = c.order[:0]
}

func (c *conn) push(e Event, buf *[]Sample) {
	if c.s.opts.Direct != nil {
		e.buf = buf
		c.s.c.samples.Add(uint64(len(e.Samples)))
		c.out = append(c.out, e)
		return
	}
	e.Slot = nil // a slot is the reading goroutine's, and queued events leave it
	_ = c.s.q.push(c.ctx, queued{ev: e, buf: buf})
}

// deliver hands the events of the last read to the direct sink, on the
// reading goroutine and outside the source's lock. The sink owns their
// samples from here on (Event.Release).
func (c *conn) deliver() {
	if len(c.out) == 0 {
		return
	}
	c.s.opts.Direct(c.out)
	clear(c.out)
	c.out = c.out[:0]
}

// status reports a change of the link for every stream read through it
// (the default stream before any was read).
func (c *conn) status(st Status, err error) {
	c.s.mu.Lock()
	c.flushAll()
	streams := c.seen
	if len(streams) == 0 {
		streams = []string{c.defStream}
	}
	for _, id := range streams {
		c.push(Event{Stream: id, Status: st, Err: err}, nil)
	}
	c.s.mu.Unlock()
	c.deliver()
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
// read that timed out; such a link also holds its reads for Options.Hold.
func (c *conn) pump(r io.Reader, deadline func(time.Time) error) error {
	var h holder
	if deadline != nil {
		h.hold = c.s.opts.Hold
	}
	h.buf = make([]byte, 0, h.size())
	for {
		if c.ctx.Err() != nil {
			h.flush(c)
			return c.ctx.Err()
		}
		if deadline != nil {
			_ = deadline(h.deadline(time.Now()))
		}
		n, err := r.Read(h.buf[len(h.buf):cap(h.buf)])
		if n > 0 {
			h.add(c, n)
		}
		if err != nil {
			var ne net.Error
			if errors.As(err, &ne) && ne.Timeout() {
				h.due(c, time.Now())
				c.checkSilence()
				continue
			}
			h.flush(c)
			return err
		}
		if n == 0 {
			c.checkSilence()
		}
	}
}

// A holder keeps the bytes of a live link's reads for up to hold and
// decodes them together (Options.Hold). A live sender writes every few
// milliseconds, one sample of each of its streams per write; decoding the
// writes of 50 ms at once visits each stream's state once for five
// samples, while it is still in the processor's caches, and hands five
// samples at a time to the analysis. With hold 0 every read is decoded as
// it comes.
type holder struct {
	hold  time.Duration
	buf   []byte
	since time.Time // when the oldest held byte was read
}

// size is the capacity of the read buffer: one readChunk, or eight when
// reads are held, so that a read always has a readChunk of room.
func (h *holder) size() int {
	if h.hold > 0 {
		return 8 * readChunk
	}
	return readChunk
}

// deadline is when the next read gives up: in 250 ms, or when the held
// bytes are due.
func (h *holder) deadline(now time.Time) time.Time {
	d := now.Add(250 * time.Millisecond)
	if len(h.buf) > 0 {
		if due := h.since.Add(h.hold); due.Before(d) {
			return due
		}
	}
	return d
}

// add takes the n bytes just read into the buffer and decodes what is
// held once it is due or the buffer has less than a readChunk of room;
// otherwise it waits until the held bytes are due.
func (h *holder) add(c *conn, n int) {
	if h.hold <= 0 {
		c.write(h.buf[:n])
		return
	}
	now := time.Now()
	if len(h.buf) == 0 {
		h.since = now
	}
	h.buf = h.buf[:len(h.buf)+n]
	if cap(h.buf)-len(h.buf) < readChunk {
		h.flush(c)
		return
	}
	if h.due(c, now) {
		return
	}
	// Not due yet: rather than wake for every write of the sender, let
	// its writes gather in the socket's buffer until they are, and take
	// them in one read.
	backoff.Sleep(c.ctx, nil, h.since.Add(h.hold).Sub(now))
}

// due decodes the held bytes if their time has come, and says so.
func (h *holder) due(c *conn, now time.Time) bool {
	if len(h.buf) == 0 || now.Sub(h.since) < h.hold {
		return false
	}
	h.flush(c)
	return true
}

// flush decodes every held byte.
func (h *holder) flush(c *conn) {
	if len(h.buf) == 0 {
		return
	}
	c.write(h.buf)
	h.buf = h.buf[:0]
}

// streamFor returns the default stream of the n-th client of tcp-listen in
// per-client mode: the configured id with "-<n>", cut to the longest id.
func streamFor(base string, n uint64) string {
	suffix := fmt.Sprintf("-%d", n)
	return base[:min(len(base), maxStreamID-len(suffix))] + suffix
}
