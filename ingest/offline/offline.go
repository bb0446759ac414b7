// Package offline reads a whole recording (a file, stdin) and hands its
// samples to per-stream handlers, on one core or several. `trapline
// analyze --workers 1` reads through it (ingest/input's RunPipelined, one
// worker, in input order); by default the verb reads on one goroutine.
//
// With Workers 0 the calling goroutine decodes and runs the handlers. With
// Workers ≥ 1 it only decodes, and that many goroutines run the handlers:
// decoding and analysis overlap, and the streams of a multiplexed file are
// spread over the workers. Samples travel in batches that go round between
// the decoder and each worker through two bounded channels, so nothing is
// allocated per batch and memory stays at Workers × Depth batches.
//
// It depends on ingest only; what a handler does (breath analysis,
// detectors, output) is the caller's.
package offline

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sync"

	"trapline/ingest"
)

// Options configure Run.
type Options struct {
	// Format is the wire format of the recording (text when empty).
	Format ingest.Format
	// Decoder configures the decoder (columns, rate, default stream).
	Decoder ingest.DecoderOptions
	// Workers is the number of goroutines that run the handlers; 0 runs
	// them on the calling goroutine. Stream i (in order of appearance) is
	// always handled by worker i mod Workers, so a file of one stream gains
	// from one worker (decoding and analysis overlap) and no more.
	Workers int
	// BatchSamples is the number of samples handed over at once; 0 means
	// 4096.
	BatchSamples int
	// Depth is the number of batches in flight per worker; 0 means 4.
	Depth int
	// ReadBytes is the size of a read; 0 means 256 KiB.
	ReadBytes int
	// InOrder calls the handlers in the order of the input, once per run
	// of consecutive samples of one stream, rather than once per stream
	// per batch. With one worker (or none) every handler call then comes
	// in input order, so output that handlers write as it happens is the
	// output of analysing the file sample by sample on one goroutine.
	InOrder bool
}

// Handler receives the samples of one stream in order, always from the
// same goroutine. The slice is only valid during the call.
type Handler func(samples []ingest.Sample)

// OpenFunc returns the handler of a stream when it first appears, or nil to
// ignore the stream. It is
// called on the goroutine that will run the handler; with several workers,
// calls for different streams may run at the same time.
type OpenFunc func(stream string) Handler

// Run reads r to its end, decodes it and passes every sample to the
// handler of its stream. It returns the decoder's counters, and an error
// when reading fails, the input names a layout that cannot be used, or ctx
// ends (ctx.Err()). Run returns only after every worker has returned.
func Run(ctx context.Context, r io.Reader, opts Options, open OpenFunc) (ingest.DecoderStats, error) {
	if opts.Workers < 0 {
		return ingest.DecoderStats{}, fmt.Errorf("offline: %d workers: want 0 or more", opts.Workers)
	}
	if opts.BatchSamples <= 0 {
		opts.BatchSamples = 4096
	}
	if opts.Depth <= 0 {
		opts.Depth = 4
	}
	if opts.ReadBytes <= 0 {
		opts.ReadBytes = 256 << 10
	}
	d := &dispatch{ctx: ctx, open: open, batchSamples: opts.BatchSamples, index: map[string]int32{}, inOrder: opts.InOrder}
	dec, err := ingest.NewDecoder(opts.Format, opts.Decoder, d.emit)
	if err != nil {
		return ingest.DecoderStats{}, fmt.Errorf("offline: %w", err)
	}
	d.start(opts.Workers, opts.Depth)
	err = d.read(r, dec, opts.ReadBytes)
	d.stop()
	if err == nil {
		err = dec.Err()
	}
	return dec.Stats(), err
}

// dispatch is the decoding side: it assigns stream indexes, fills one batch
// per worker and hands full batches over.
type dispatch struct {
	ctx          context.Context
	open         OpenFunc
	batchSamples int
	ids          []string
	index        map[string]int32
	last         string
	lastIdx      int32
	have         bool
	workers      []*worker
	cur          []*ingest.Batch // the batch being filled, per worker
	inline       *worker         // Workers 0: handlers run here
	wg           sync.WaitGroup
	cancelled    bool
	inOrder      bool
}

func (d *dispatch) start(n, depth int) {
	if n == 0 {
		d.inline = &worker{open: d.open, inOrder: d.inOrder}
		d.cur = []*ingest.Batch{{}}
		return
	}
	for range n {
		w := &worker{open: d.open, inOrder: d.inOrder, full: make(chan *ingest.Batch, depth), free: make(chan *ingest.Batch, depth)}
		for range depth - 1 {
			w.free <- &ingest.Batch{}
		}
		d.workers = append(d.workers, w)
		d.cur = append(d.cur, &ingest.Batch{})
		d.wg.Add(1)
		go func() {
			defer d.wg.Done()
			w.run()
		}()
	}
}

// read feeds the decoder until the end of r.
func (d *dispatch) read(r io.Reader, dec ingest.Decoder, size int) error {
	buf := make([]byte, size)
	for {
		if err := d.ctx.Err(); err != nil {
			return err
		}
		n, err := r.Read(buf)
		if n > 0 {
			_, _ = dec.Write(buf[:n])
		}
		if errors.Is(err, io.EOF) {
			dec.Flush()
			return d.ctx.Err()
		}
		if err != nil {
			return fmt.Errorf("offline: read: %w", err)
		}
	}
}

// stop hands over what is left, lets the workers finish and waits for them.
func (d *dispatch) stop() {
	for k := range d.cur {
		d.hand(k)
	}
	for _, w := range d.workers {
		close(w.full)
	}
	d.wg.Wait()
}

// emit is the decoder's callback: it appends the sample to the batch of its
// stream's worker.
func (d *dispatch) emit(stream string, s ingest.Sample) {
	if !d.have || stream != d.last {
		x, ok := d.index[stream]
		if !ok {
			x = int32(len(d.ids))
			d.ids = append(d.ids, stream)
			d.index[stream] = x
		}
		d.last, d.lastIdx, d.have = stream, x, true
	}
	k := int(d.lastIdx) % len(d.cur)
	b := d.cur[k]
	b.Samples = append(b.Samples, s)
	b.Streams = append(b.Streams, d.lastIdx)
	if len(b.Samples) >= d.batchSamples {
		d.hand(k)
	}
}

// hand passes the batch of worker k on (or runs it here without workers)
// and takes an empty one.
func (d *dispatch) hand(k int) {
	b := d.cur[k]
	if b.Len() == 0 || d.cancelled {
		return
	}
	b.IDs = d.ids
	if d.inline != nil {
		d.inline.handle(b)
		b.Reset()
		return
	}
	w := d.workers[k]
	select {
	case w.full <- b:
	case <-d.ctx.Done():
		d.cancelled = true
		return
	}
	select {
	case d.cur[k] = <-w.free:
	case <-d.ctx.Done():
		d.cancelled = true
		d.cur[k] = &ingest.Batch{}
	}
}

// worker runs the handlers of its streams.
type worker struct {
	open     OpenFunc
	full     chan *ingest.Batch
	free     chan *ingest.Batch
	demux    ingest.Demux
	handlers []Handler // by stream index
	inOrder  bool
}

func (w *worker) run() {
	for b := range w.full {
		w.handle(b)
		b.Reset()
		w.free <- b // never blocks: the decoder took this place from free
	}
}

// handle splits a batch by stream and calls each stream's handler once,
// or with InOrder once per run of one stream, in input order.
func (w *worker) handle(b *ingest.Batch) {
	if w.inOrder {
		for i := 0; i < len(b.Streams); {
			x, j := b.Streams[i], i+1
			for j < len(b.Streams) && b.Streams[j] == x {
				j++
			}
			w.handler(x, b.IDs[x])(b.Samples[i:j:j])
			i = j
		}
		return
	}
	for _, sp := range w.demux.Split(b) {
		w.handler(sp.Index, sp.Stream)(sp.Samples)
	}
}

// handler returns the handler of stream index x, opening it the first time.
func (w *worker) handler(x int32, stream string) Handler {
	for int(x) >= len(w.handlers) {
		w.handlers = append(w.handlers, nil)
	}
	h := w.handlers[x]
	if h == nil {
		if h = w.open(stream); h == nil {
			h = func([]ingest.Sample) {} // the caller wants none of this stream
		}
		w.handlers[x] = h
	}
	return h
}
