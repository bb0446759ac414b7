package record

import (
	"context"
	"errors"
	"fmt"
	"os"
	"sync"
	"sync/atomic"
	"time"

	"trapline/ingest"
)

// File is what the writer needs of an open file. Tests put a small
// filesystem behind it to play a full disk.
type File interface {
	Write(p []byte) (int, error)
	Sync() error
	Close() error
}

// Options configure a Writer. Zero values take the defaults named.
type Options struct {
	// Dir is the recording directory; it is created if missing.
	Dir string
	// SegmentLength is the wall-time span of one segment: a stream's
	// segment is closed at the next multiple of it (UTC). Default 10 min.
	SegmentLength time.Duration
	// MaxAge deletes closed segments whose last record is older; 0 keeps
	// them by age.
	MaxAge time.Duration
	// MaxBytes deletes the oldest closed segments while all segments
	// together are larger; 0 keeps them by size.
	MaxBytes int64
	// SyncEvery is the period of fsync of the open segments. Default 10 s.
	SyncEvery time.Duration
	// BufferBytes bounds the bytes waiting for the disk; a read that does
	// not fit is dropped. Default 16 MiB.
	BufferBytes int
	// RetryEvery is how long the writer drops records after a write error
	// before it tries the disk again. Default 10 s.
	RetryEvery time.Duration
	// Now is the wall clock; nil means time.Now.
	Now func() time.Time
	// OnState is called from the writer's goroutine whenever the writer
	// becomes degraded (records are being dropped) or healthy again. It
	// must not block for long.
	OnState func(Stats)
	// Create opens a new file for writing; nil creates it with os.OpenFile
	// (O_CREATE|O_EXCL, mode 0640).
	Create func(path string) (File, error)
}

// Stats counts what a Writer did. Degraded is true while records are being
// dropped; Reason says why.
type Stats struct {
	Records        uint64 // records written
	Bytes          uint64 // payload bytes written
	DroppedRecords uint64 // records dropped: buffer full, disk error, bad source
	DroppedBytes   uint64 // payload bytes of the dropped records
	WriteErrors    uint64 // failed writes, syncs, creates and closes
	Segments       int    // segment files on disk, open ones included
	DiskBytes      int64  // their total size
	Deleted        uint64 // segments deleted by retention
	Degraded       bool
	Reason         string
}

// Errors reported in Stats.Reason.
var (
	// ErrOverflow is the reason when reads arrive faster than the disk
	// takes them.
	ErrOverflow = errors.New("recording buffer full")
	// ErrClosed is returned by a Writer used after Close.
	ErrClosed = errors.New("recorder closed")
)

// item is one read waiting for the disk.
type item struct {
	src  Source
	kind Kind
	t    time.Time
	data []byte
}

// itemOverhead is what one queued item counts against BufferBytes beyond
// its data, so that a flood of empty reads is bounded too.
const itemOverhead = 64

// Writer records the bytes of many sources into a recording directory. Its
// methods never block on the disk: each read is copied into a bounded
// buffer that one goroutine, owned by the Writer, writes out.
type Writer struct {
	opts Options

	mu      sync.Mutex
	queue   []item
	queued  int
	closed  bool
	ovRecs  atomic.Uint64 // records dropped because the buffer was full
	ovBytes atomic.Uint64 // and their payload bytes
	ovSeen  uint64        // ovRecs at the last round; owned by the goroutine

	wake chan struct{}
	done chan struct{}
	stop context.CancelFunc

	stats atomic.Pointer[Stats]
	disk  *disk // owned by the goroutine
}

// Open prepares the directory, adopts the segments already in it (those of
// an earlier run, listed in the index or found on disk) and starts the
// writing goroutine, which runs until ctx is cancelled or Close is called.
func Open(ctx context.Context, opts Options) (*Writer, error) {
	opts = withDefaults(opts)
	if opts.Dir == "" {
		return nil, errors.New("recording directory not set")
	}
	if err := os.MkdirAll(opts.Dir, 0o750); err != nil {
		return nil, fmt.Errorf("create recording directory: %w", err)
	}
	d, err := openDisk(opts)
	if err != nil {
		return nil, err
	}
	ctx, cancel := context.WithCancel(ctx)
	w := &Writer{opts: opts, wake: make(chan struct{}, 1), done: make(chan struct{}), stop: cancel, disk: d}
	w.publish()
	go w.run(ctx)
	return w, nil
}

func withDefaults(o Options) Options {
	if o.SegmentLength <= 0 {
		o.SegmentLength = 10 * time.Minute
	}
	if o.SyncEvery <= 0 {
		o.SyncEvery = 10 * time.Second
	}
	if o.BufferBytes <= 0 {
		o.BufferBytes = 16 << 20
	}
	if o.RetryEvery <= 0 {
		o.RetryEvery = 10 * time.Second
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if o.Create == nil {
		o.Create = func(p string) (File, error) {
			return os.OpenFile(p, os.O_CREATE|os.O_EXCL|os.O_WRONLY, 0o640)
		}
	}
	return o
}

// Write records bytes read from src, stamped with the current wall time.
// It copies p and returns at once; false means the read was dropped (the
// buffer is full or the writer is closed) and counted.
func (w *Writer) Write(src Source, p []byte) bool { return w.add(src, KindData, p) }

// Reset records that src's link dropped in the middle of a line or frame.
func (w *Writer) Reset(src Source) bool { return w.add(src, KindReset, nil) }

// End records that src's input ended (the end of a file).
func (w *Writer) End(src Source) bool { return w.add(src, KindEnd, nil) }

func (w *Writer) add(src Source, k Kind, p []byte) bool {
	for len(p) > MaxPayload {
		if !w.add(src, k, p[:MaxPayload]) {
			return false
		}
		p = p[MaxPayload:]
	}
	t := w.opts.Now()
	w.mu.Lock()
	if w.closed || w.queued+len(p)+itemOverhead > w.opts.BufferBytes {
		w.mu.Unlock()
		w.ovRecs.Add(1)
		w.ovBytes.Add(uint64(len(p)))
		return false
	}
	w.queue = append(w.queue, item{src: src, kind: k, t: t, data: append([]byte(nil), p...)})
	w.queued += len(p) + itemOverhead
	w.mu.Unlock()
	select {
	case w.wake <- struct{}{}:
	default:
	}
	return true
}

// Stats returns the counters as of the writer's last round (at most a
// second old while it is busy).
func (w *Writer) Stats() Stats {
	s := *w.stats.Load()
	s.DroppedRecords += w.ovRecs.Load()
	s.DroppedBytes += w.ovBytes.Load()
	return s
}

// Close writes what is buffered, closes and fsyncs the open segments,
// writes the index and stops the goroutine. Later writes are dropped.
func (w *Writer) Close() error {
	w.mu.Lock()
	w.closed = true
	w.mu.Unlock()
	w.stop()
	<-w.done
	return w.disk.closeErr
}

// take empties the queue.
func (w *Writer) take() []item {
	w.mu.Lock()
	defer w.mu.Unlock()
	q := w.queue
	w.queue, w.queued = nil, 0
	return q
}

// run is the writing goroutine.
func (w *Writer) run(ctx context.Context) {
	defer close(w.done)
	tick := time.NewTicker(time.Second)
	defer tick.Stop()
	for {
		select {
		case <-ctx.Done():
			w.mu.Lock()
			w.closed = true
			w.mu.Unlock()
			w.disk.writeAll(w.take())
			w.disk.closeAll()
			w.publish()
			return
		case <-w.wake:
		case <-tick.C:
		}
		w.disk.writeAll(w.take())
		w.disk.housekeep()
		w.publish()
	}
}

// publish updates the shared counters and reports a change of state.
func (w *Writer) publish() {
	d := w.disk
	ov := w.ovRecs.Load()
	now := w.opts.Now()
	if ov != w.ovSeen {
		// Stay degraded for a while after the last overflow, so that a
		// burst of drops gives one report, not one per round.
		d.overflowUntil = now.Add(w.opts.RetryEvery)
	}
	w.ovSeen = ov
	s := d.stats
	s.Segments, s.DiskBytes = d.footprint()
	switch {
	case d.failing(now):
		s.Degraded, s.Reason = true, d.lastErr.Error()
	case now.Before(d.overflowUntil):
		s.Degraded, s.Reason = true, ErrOverflow.Error()
	}
	prev := w.stats.Swap(&s)
	if prev != nil && prev.Degraded == s.Degraded && prev.Reason == s.Reason {
		return
	}
	if w.opts.OnState != nil && (prev != nil || s.Degraded) {
		w.opts.OnState(w.Stats())
	}
}

// Tap records what a live source reads; pass it as ingest.Options.Tap.
func (w *Writer) Tap(src ingest.TapSource, k ingest.TapKind, p []byte) {
	s := Source{Stream: src.Stream, Format: src.Format, Columns: src.Columns, RateHz: src.RateHz}
	switch k {
	case ingest.TapReset:
		w.Reset(s)
	case ingest.TapEnd:
		w.End(s)
	default:
		w.Write(s, p)
	}
}
