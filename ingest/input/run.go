package input

import (
	"context"
	"fmt"
	"io"

	"trapline/ingest"
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
	st := Stats{Kind: in.kind}
	var done int64
	progress := func(n int64) {
		done += n
		if in.opts.Progress != nil {
			in.opts.Progress(done, in.total)
		}
	}
	if in.rec != nil {
		ss, err := in.rec.Samples(ctx, in.opts.Filter, progress, emit)
		st.Decode, st.Scan = ss.Decode, ss.Scan
		if err != nil {
			return st, fmt.Errorf("read recording %s: %w", in.name, err)
		}
		if st.Decode.Samples == 0 {
			return st, fmt.Errorf("read recording %s: no samples in the chosen streams and time range", in.name)
		}
		return st, nil
	}
	dopts := in.opts.Decoder
	dopts.Runs = runs
	d, err := ingest.NewDecoder(ingest.Format(in.kind), dopts, emit)
	if err != nil {
		return st, err
	}
	err = ingest.Decode(&progressReader{ctx: ctx, r: in.r, add: progress}, d)
	st.Decode = d.Stats()
	if err != nil {
		return st, fmt.Errorf("read %s: %w", in.name, err)
	}
	if err := d.Err(); err != nil {
		return st, fmt.Errorf("read %s: %w", in.name, err)
	}
	if st.Decode.Samples == 0 {
		return st, in.noSamples(st.Decode)
	}
	return st, nil
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
