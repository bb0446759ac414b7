package input

import (
	"context"
	"fmt"
	"io"

	"trapline/ingest"
	"trapline/ingest/offline"
)

// Run reads the whole input and calls emit for every sample with its
// stream id, in input order (for a recording: segment by segment in order
// of their first record). It returns when the input ends or ctx is
// cancelled. An input that yields no sample is an error that says what was
// expected.
func (in *Input) Run(ctx context.Context, emit ingest.EmitFunc) (Stats, error) {
	return in.RunBatched(ctx, emit, nil)
}

// RunBatched is Run with the samples of ordinary text lines handed to runs
// in runs of one stream (ingest.DecoderOptions.Runs), the others to emit,
// in input order. runs may be nil.
func (in *Input) RunBatched(ctx context.Context, emit ingest.EmitFunc, runs ingest.RunFunc) (Stats, error) {
	if in.rec != nil {
		return in.runRecording(ctx, emit)
	}
	st := Stats{Kind: in.kind}
	dopts := in.opts.Decoder
	dopts.Runs = runs
	d, err := ingest.NewDecoder(ingest.Format(in.kind), dopts, emit)
	if err != nil {
		return st, err
	}
	err = ingest.Decode(&progressReader{ctx: ctx, r: in.r, add: in.progress()}, d)
	st.Decode = d.Stats()
	if err == nil {
		err = d.Err()
	}
	return st, in.decoded(st, err)
}

// RunPipelined reads the whole input as RunBatched does, on two
// goroutines: the calling one reads and decodes, a second one calls runs,
// one run of one stream at a time, in input order (ingest/offline with
// one worker, InOrder). Decoding and analysis then overlap, which takes
// less wall time when a second core is free, for about the same CPU or a
// little more (docs/operations.md). A recording directory is read on one
// goroutine, its samples handed to runs one at a time.
func (in *Input) RunPipelined(ctx context.Context, runs ingest.RunFunc) (Stats, error) {
	if in.rec != nil {
		var one [1]ingest.Sample
		return in.runRecording(ctx, func(stream string, s ingest.Sample) {
			one[0] = s
			runs(stream, one[:])
		})
	}
	st := Stats{Kind: in.kind}
	opts := offline.Options{Format: ingest.Format(in.kind), Decoder: in.opts.Decoder, Workers: 1, InOrder: true}
	ds, err := offline.Run(ctx, &progressReader{ctx: ctx, r: in.r, add: in.progress()}, opts, func(stream string) offline.Handler {
		return func(ss []ingest.Sample) { runs(stream, ss) }
	})
	st.Decode = ds
	return st, in.decoded(st, err)
}

// runRecording reads a recording directory's samples into emit.
func (in *Input) runRecording(ctx context.Context, emit ingest.EmitFunc) (Stats, error) {
	st := Stats{Kind: in.kind}
	ss, err := in.rec.Samples(ctx, in.opts.Filter, in.progress(), emit)
	st.Decode, st.Scan = ss.Decode, ss.Scan
	if err != nil {
		return st, fmt.Errorf("read recording %s: %w", in.name, err)
	}
	if st.Decode.Samples == 0 {
		return st, fmt.Errorf("read recording %s: no samples in the chosen streams and time range", in.name)
	}
	return st, nil
}

// progress returns the function that counts the bytes read and reports
// them to Options.Progress.
func (in *Input) progress() func(int64) {
	var done int64
	return func(n int64) {
		done += n
		if in.opts.Progress != nil {
			in.opts.Progress(done, in.total)
		}
	}
}

// decoded turns the end of decoding a file or stdin into Run's error: the
// reading or layout error err, or none when there were no samples.
func (in *Input) decoded(st Stats, err error) error {
	if err != nil {
		return fmt.Errorf("read %s: %w", in.name, err)
	}
	if st.Decode.Samples == 0 {
		return in.noSamples(st.Decode)
	}
	return nil
}

// noSamples explains an input that gave nothing.
func (in *Input) noSamples(s ingest.DecoderStats) error {
	if in.kind == KindBinary {
		return fmt.Errorf("read %s: no samples (%d bad frames, %d bytes skipped): want the binary framing v1", in.name, s.BadFrames, s.SkippedBytes)
	}
	return fmt.Errorf("read %s: no samples (%d bad lines): want the sample line format v1, e.g. %q, or the binary framing", in.name, s.BadLines, ingest.DefaultColumns)
}

// progressReader counts the bytes read and stops when ctx is cancelled.
type progressReader struct {
	ctx context.Context
	r   io.Reader
	add func(int64)
}

func (p *progressReader) Read(b []byte) (int, error) {
	if err := p.ctx.Err(); err != nil {
		return 0, err
	}
	n, err := p.r.Read(b)
	if n > 0 {
		p.add(int64(n))
	}
	return n, err
}
