package simulator

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"time"

	"trapline/ingest"
)

// StreamOptions configure Stream.
type StreamOptions struct {
	// Encoder writes the samples (ingest.NewTextEncoder or
	// ingest.NewBinaryEncoder); required.
	Encoder ingest.Encoder
	// Speed is simulated seconds per wall-clock second: 1 is real time, 10
	// ten times faster; 0 or +Inf writes as fast as the output takes it.
	Speed float64
	// StreamColumn makes a text encoder write the stream id of the samples
	// in a stream column (header and every line); binary frames always carry
	// it. Set it when the stream id was given on purpose (sim --stream), so
	// that several text writers on one source stay apart at the reader.
	StreamColumn bool
	// Truth, when set, receives the ground truth of every completed breath
	// as one JSON object per line.
	Truth io.Writer
	// OnTruth, when set, is called with every completed breath.
	OnTruth func(Truth)
	// OnLink, when set, is called at every scripted disconnection and
	// reconnection.
	OnLink func(LinkEvent)
}

// StreamStats says what Stream wrote.
type StreamStats struct {
	Samples uint64 // samples encoded and handed to the output
	Breaths uint64 // ground-truth records written
	Bytes   uint64 // bytes handed to the output
}

// paceTickS is the shortest sleep of the pacer: samples due within it are
// written together, so that 1000 Hz needs no thousand wake-ups a second.
const paceTickS = 0.01

// Stream runs sim to its end (or until ctx is cancelled) and writes its
// samples to out through the encoder, paced by opts.Speed. Scripted
// disconnections close the output and reconnections reopen it (a new pseudo
// terminal, a new TCP connection), each at its scenario time. It returns
// nil at the end of the scenario, ctx.Err() when cancelled, and an error
// when the output fails for good. Stream closes out before it returns.
func Stream(ctx context.Context, sim *Sim, out Output, opts StreamOptions) (StreamStats, error) {
	if opts.Encoder == nil {
		return StreamStats{}, errors.New("stream: no encoder")
	}
	enc := opts.Encoder
	if te, ok := enc.(*ingest.TextEncoder); ok && opts.StreamColumn {
		enc = te.WithStream()
	}
	w, err := newPacedWriter(ctx, out, enc, opts.Speed, opts.Truth, opts.OnTruth)
	if err != nil {
		return StreamStats{}, err
	}
	if c, ok := out.(interface{ keepTime(bool) }); ok {
		// A paced run keeps time like a cable; "as fast as the output
		// takes it" waits for the reader.
		c.keepTime(opts.Speed > 0 && !math.IsInf(opts.Speed, 1))
	}
	defer w.close()
	if err := w.open(); err != nil {
		return w.st, err
	}
	for {
		smp, ok := sim.Next()
		if err := w.links(sim, opts.OnLink); err != nil {
			return w.st, err
		}
		if err := w.truth(sim); err != nil {
			return w.st, err
		}
		if !ok {
			break
		}
		if err := w.sample(sim.Stream(), smp); err != nil {
			return w.st, err
		}
	}
	return w.st, w.finish()
}

// pacedWriter is the writing half shared by Stream and StreamWard: it
// encodes samples into a buffer, holds them back to the pace of their
// time stamps, keeps datagrams whole, writes the ground truth, and closes
// the output when the context ends so that a blocked write returns.
type pacedWriter struct {
	ctx     context.Context
	out     Output
	enc     ingest.Encoder
	speed   float64
	paced   bool
	start   time.Time
	chunk   int
	buf     []byte
	line    []byte
	truthW  io.Writer
	onTruth func(Truth)
	st      StreamStats
	done    chan struct{}
	closed  chan struct{}
}

func newPacedWriter(ctx context.Context, out Output, enc ingest.Encoder, speed float64, truthW io.Writer, onTruth func(Truth)) (*pacedWriter, error) {
	if speed < 0 || math.IsNaN(speed) {
		return nil, fmt.Errorf("stream: speed %g must be positive", speed)
	}
	w := &pacedWriter{ctx: ctx, out: out, enc: enc, speed: speed, paced: speed > 0 && !math.IsInf(speed, 1),
		chunk: out.MaxWrite(), buf: make([]byte, 0, 4096), line: make([]byte, 0, 256),
		truthW: truthW, onTruth: onTruth, done: make(chan struct{}), closed: make(chan struct{})}
	// Closing the output from here unblocks a write stuck on a reader that
	// went away, so that cancellation is prompt.
	go func() {
		defer close(w.closed)
		select {
		case <-ctx.Done():
			out.Close()
		case <-w.done:
		}
	}()
	return w, nil
}

// close stops the watcher goroutine and closes the output.
func (w *pacedWriter) close() {
	close(w.done)
	<-w.closed
	w.out.Close()
}

// open opens the output with the encoder's header and starts the clock.
func (w *pacedWriter) open() error {
	if err := w.out.Open(w.ctx, w.enc.Header()); err != nil {
		return ctxErr(w.ctx, fmt.Errorf("open output: %w", err))
	}
	w.start = time.Now()
	return nil
}

// due returns how long until sample time simS is due.
func (w *pacedWriter) due(simS float64) time.Duration {
	return time.Until(w.start.Add(time.Duration(simS / w.speed * float64(time.Second))))
}

// wait sleeps until sample time simS is due, unless it is due within a tick.
func (w *pacedWriter) wait(simS float64) error {
	if !w.paced {
		return w.ctx.Err()
	}
	d := w.due(simS)
	if d < time.Duration(paceTickS*float64(time.Second)) {
		return w.ctx.Err()
	}
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-w.ctx.Done():
		return w.ctx.Err()
	case <-t.C:
		return nil
	}
}

// flush writes the buffered samples.
func (w *pacedWriter) flush() error {
	if len(w.buf) == 0 {
		return nil
	}
	err := w.out.Write(w.buf)
	w.st.Bytes += uint64(len(w.buf))
	w.buf = w.buf[:0]
	return ctxErr(w.ctx, err)
}

// sample encodes one sample of a stream, writing what is buffered first when
// the sample is not due yet (so the reader gets it on time) or when the
// buffer is full.
func (w *pacedWriter) sample(stream string, smp ingest.Sample) error {
	if w.paced && len(w.buf) > 0 && w.due(smp.TimeS) >= time.Duration(paceTickS*float64(time.Second)) {
		if err := w.flush(); err != nil {
			return err
		}
	}
	if err := w.wait(smp.TimeS); err != nil {
		return err
	}
	n := len(w.buf)
	w.buf = w.enc.Append(w.buf, stream, smp)
	w.st.Samples++
	if w.chunk > 0 && len(w.buf) > w.chunk {
		// Keep datagrams whole: send what came before this sample.
		rest := append([]byte(nil), w.buf[n:]...)
		w.buf = w.buf[:n]
		if err := w.flush(); err != nil {
			return err
		}
		w.buf = append(w.buf, rest...)
	} else if len(w.buf) >= 32<<10 {
		return w.flush()
	}
	return nil
}

// truth writes the ground truth of the breaths sim completed.
func (w *pacedWriter) truth(sim *Sim) error {
	for _, tr := range sim.TakeTruth() {
		w.st.Breaths++
		if w.onTruth != nil {
			w.onTruth(tr)
		}
		if w.truthW == nil {
			continue
		}
		b, err := json.Marshal(tr)
		if err != nil {
			return fmt.Errorf("encode truth: %w", err)
		}
		w.line = append(append(w.line[:0], b...), '\n')
		if _, err := w.truthW.Write(w.line); err != nil {
			return fmt.Errorf("write truth: %w", err)
		}
	}
	return nil
}

// links plays the scripted disconnections and reconnections of sim on the
// output, each at its time.
func (w *pacedWriter) links(sim *Sim, onLink func(LinkEvent)) error {
	for _, ev := range sim.TakeLinkEvents() {
		if err := w.flush(); err != nil {
			return err
		}
		if !ev.Up {
			// A reader that keeps up gets every sample sent before the
			// disconnection; one that does not loses the rest.
			w.drain()
		}
		if err := w.wait(ev.TimeS); err != nil {
			return err
		}
		if ev.Up {
			if err := w.out.Reconnect(w.ctx); err != nil {
				return ctxErr(w.ctx, fmt.Errorf("reconnect output: %w", err))
			}
		} else if err := w.out.Disconnect(); err != nil {
			return ctxErr(w.ctx, fmt.Errorf("disconnect output: %w", err))
		}
		if onLink != nil {
			onLink(ev)
		}
	}
	return nil
}

// drain waits, for a bounded time, for the reader to take what was written.
func (w *pacedWriter) drain() {
	if d, ok := w.out.(interface{ drain(context.Context) }); ok {
		dctx, cancel := context.WithTimeout(w.ctx, drainTimeout)
		d.drain(dctx)
		cancel()
	}
}

// finish writes what is left and lets the reader take it.
func (w *pacedWriter) finish() error {
	if err := w.flush(); err != nil {
		return err
	}
	w.drain()
	return nil
}

// drainTimeout bounds the wait for a reader to take the last samples at
// the end of a run.
const drainTimeout = 5 * time.Second

// ctxErr prefers the context's error: a write that failed because Stream
// closed the output on cancellation is a cancellation.
func ctxErr(ctx context.Context, err error) error {
	if ctx.Err() != nil {
		return ctx.Err()
	}
	return err
}
