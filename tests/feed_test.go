package tests

import (
	"context"
	"fmt"
	"io"
	"time"

	"trapline/ingest"
	"trapline/simulator"
)

// playSim writes a simulated patient to w in the sample line format, paced
// so that sample time runs speed times faster than wall time (a scripted
// disconnection is silence), until the scenario ends or ctx is cancelled.
// It returns the number of samples written.
func playSim(ctx context.Context, w io.Writer, sim *simulator.Sim, speed float64) (int, error) {
	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: 4})
	if err != nil {
		return 0, err
	}
	if _, err := w.Write(enc.Header()); err != nil {
		return 0, fmt.Errorf("write header: %w", err)
	}
	tick := time.NewTicker(10 * time.Millisecond)
	defer tick.Stop()
	start := time.Now()
	var (
		buf     []byte
		next    ingest.Sample
		pending bool
		n       int
	)
	for {
		select {
		case <-ctx.Done():
			return n, ctx.Err()
		case <-tick.C:
		}
		nowS := time.Since(start).Seconds() * speed
		buf = buf[:0]
		done := false
		for {
			if !pending {
				s, ok := sim.Next()
				if !ok {
					done = true
					break
				}
				next, pending = s, true
			}
			if next.TimeS > nowS {
				break
			}
			buf = enc.Append(buf, sim.Stream(), next)
			pending = false
			n++
		}
		if len(buf) > 0 {
			if _, err := w.Write(buf); err != nil {
				return n, fmt.Errorf("write samples: %w", err)
			}
		}
		if done {
			return n, nil
		}
	}
}
