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
	var st StreamStats
	if opts.Encoder == nil {
		return st, errors.New("stream: no encoder")
	}
	if opts.Speed < 0 || math.IsNaN(opts.Speed) {
		return st, fmt.Errorf("stream: speed %g must be positive", opts.Speed)
	}
	// Closing the output from here unblocks a write stuck on a reader that
	// went away, so that cancellation is prompt.
	done := make(chan struct{})
	closed := make(chan struct{})
	go func() {
		defer close(closed)
		select {
		case <-ctx.Done():
			out.Close()
		case <-done:
		}
	}()
	defer func() {
		close(done)
		<-closed
		out.Close()
	}()

	header := opts.Encoder.Header()
	if err := out.Open(ctx, header); err != nil {
		return st, ctxErr(ctx, fmt.Errorf("open output: %w", err))
	}
	paced := opts.Speed > 0 && !math.IsInf(opts.Speed, 1)
	start := time.Now()
	wait := func(simS float64) error {
		if !paced {
			return ctx.Err()
		}
		due := start.Add(time.Duration(simS / opts.Speed * float64(time.Second)))
		d := time.Until(due)
		if d < time.Duration(paceTickS*float64(time.Second)) {
			return ctx.Err()
		}
		t := time.NewTimer(d)
		defer t.Stop()
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-t.C:
			return nil
		}
	}
	chunk := out.MaxWrite()
	buf := make([]byte, 0, 4096)
	line := make([]byte, 0, 256)
	flush := func() error {
		if len(buf) == 0 {
			return nil
		}
		err := out.Write(buf)
		st.Bytes += uint64(len(buf))
		buf = buf[:0]
		return err
	}
	writeTruth := func() error {
		for _, tr := range sim.TakeTruth() {
			st.Breaths++
			if opts.OnTruth != nil {
				opts.OnTruth(tr)
			}
			if opts.Truth != nil {
				line = line[:0]
				b, err := json.Marshal(tr)
				if err != nil {
					return fmt.Errorf("encode truth: %w", err)
				}
				line = append(append(line, b...), '\n')
				if _, err := opts.Truth.Write(line); err != nil {
					return fmt.Errorf("write truth: %w", err)
				}
			}
		}
		return nil
	}
	for {
		smp, ok := sim.Next()
		for _, ev := range sim.TakeLinkEvents() {
			if err := flush(); err != nil {
				return st, ctxErr(ctx, err)
			}
			if d, ok := out.(interface{ drain(context.Context) }); ok && !ev.Up {
				// A reader that keeps up gets every sample sent before the
				// disconnection; one that does not loses the rest.
				dctx, cancel := context.WithTimeout(ctx, drainTimeout)
				d.drain(dctx)
				cancel()
			}
			if err := wait(ev.TimeS); err != nil {
				return st, err
			}
			if ev.Up {
				if err := out.Reconnect(ctx); err != nil {
					return st, ctxErr(ctx, fmt.Errorf("reconnect output: %w", err))
				}
			} else if err := out.Disconnect(); err != nil {
				return st, ctxErr(ctx, fmt.Errorf("disconnect output: %w", err))
			}
			if opts.OnLink != nil {
				opts.OnLink(ev)
			}
		}
		if err := writeTruth(); err != nil {
			return st, err
		}
		if !ok {
			break
		}
		if paced && len(buf) > 0 && time.Until(start.Add(time.Duration(smp.TimeS/opts.Speed*float64(time.Second)))) >= time.Duration(paceTickS*float64(time.Second)) {
			if err := flush(); err != nil {
				return st, ctxErr(ctx, err)
			}
		}
		if err := wait(smp.TimeS); err != nil {
			return st, err
		}
		n := len(buf)
		buf = opts.Encoder.Append(buf, sim.Stream(), smp)
		st.Samples++
		if chunk > 0 && len(buf) > chunk {
			// Keep datagrams whole: send what came before this sample.
			rest := append([]byte(nil), buf[n:]...)
			buf = buf[:n]
			if err := flush(); err != nil {
				return st, ctxErr(ctx, err)
			}
			buf = append(buf, rest...)
		} else if len(buf) >= 32<<10 {
			if err := flush(); err != nil {
				return st, ctxErr(ctx, err)
			}
		}
	}
	if err := flush(); err != nil {
		return st, ctxErr(ctx, err)
	}
	if d, ok := out.(interface{ drain(context.Context) }); ok {
		dctx, cancel := context.WithTimeout(ctx, drainTimeout)
		d.drain(dctx)
		cancel()
	}
	return st, nil
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
