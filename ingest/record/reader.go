package record

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"trapline/ingest"
)

// Filter chooses what a Reader reads. Zero values choose everything.
type Filter struct {
	// Stream is the source stream to read; empty reads all.
	Stream string
	// From and To bound the receive time of the records read: From
	// inclusive, To exclusive.
	From, To time.Time
}

// match reports whether a record received at t passes the time bounds.
func (f Filter) match(t time.Time) bool {
	return (f.From.IsZero() || !t.Before(f.From)) && (f.To.IsZero() || t.Before(f.To))
}

// overlaps reports whether a segment may hold records that pass f.
func (f Filter) overlaps(s Segment) bool {
	if f.Stream != "" && s.Stream != f.Stream {
		return false
	}
	return (f.From.IsZero() || !s.Last.Before(f.From)) && (f.To.IsZero() || s.First.Before(f.To))
}

// Reader reads a recording directory.
type Reader struct {
	dir  string
	segs []Segment
	st   ScanStats
}

// OpenReader lists the segments of a recording directory: those in its
// index and any segment file the index lacks (one still open, or written
// before a crash).
func OpenReader(dir string) (*Reader, error) {
	fi, err := os.Stat(dir)
	if err != nil {
		return nil, fmt.Errorf("open recording: %w", err)
	}
	if !fi.IsDir() {
		return nil, fmt.Errorf("open recording %s: not a directory", dir)
	}
	segs, st, err := loadSegments(dir, nil)
	if err != nil {
		return nil, fmt.Errorf("open recording %s: %w", dir, err)
	}
	return &Reader{dir: dir, segs: segs, st: ScanStats{BadSegments: st.BadSegments}}, nil
}

// IsRecording reports whether dir looks like a recording directory: it has
// an index file or at least one segment file.
func IsRecording(dir string) bool {
	if _, err := os.Stat(filepath.Join(dir, IndexName)); err == nil {
		return true
	}
	m, _ := filepath.Glob(filepath.Join(dir, "*"+SegmentExt))
	return len(m) > 0
}

// Segments returns the segments in order of their first record.
func (r *Reader) Segments() []Segment { return append([]Segment(nil), r.segs...) }

// Size returns the total size of the segments that f selects, for progress.
func (r *Reader) Size(f Filter) int64 {
	var n int64
	for _, s := range r.segs {
		if f.overlaps(s) {
			n += s.Bytes
		}
	}
	return n
}

// RecordFunc receives one record of a source; rec.Payload is only valid
// during the call.
type RecordFunc func(src Source, rec Record) error

// Records calls fn for every record that f selects, segment after segment
// in order of their first record. progress, when not nil, is called with
// the size of each segment file after it is read. A damaged segment tail is
// skipped and counted (Stats); an error from fn stops the reading.
func (r *Reader) Records(ctx context.Context, f Filter, progress func(int64), fn RecordFunc) error {
	for _, s := range r.segs {
		if !f.overlaps(s) {
			continue
		}
		if err := ctx.Err(); err != nil {
			return err
		}
		if err := r.segment(s, f, fn); err != nil {
			return err
		}
		if progress != nil {
			progress(s.Bytes)
		}
	}
	return nil
}

// segment reads one segment file.
func (r *Reader) segment(s Segment, f Filter, fn RecordFunc) error {
	file, err := os.Open(filepath.Join(r.dir, s.Name))
	if err != nil {
		if os.IsNotExist(err) {
			return nil // deleted by retention since the listing
		}
		return fmt.Errorf("open segment: %w", err)
	}
	defer file.Close()
	sc, err := newScanner(file)
	if err != nil {
		r.st.BadSegments++
		return nil
	}
	defer func() { sc.st.Segments = 1; r.st.add(sc.st) }()
	for {
		rec, err := sc.next()
		if err == io.EOF {
			return nil
		}
		if !f.match(rec.Time) {
			continue
		}
		if err := fn(sc.head.Source, rec); err != nil {
			return err
		}
	}
}

// Stats returns what the reads so far found, damaged segments included.
func (r *Reader) Stats() ScanStats { return r.st }

// SampleStats counts what Samples decoded.
type SampleStats struct {
	Scan   ScanStats
	Decode ingest.DecoderStats
}

// Samples decodes the records that f selects with the project's decoders,
// one decoder per source stream kept across its segments (so that a text
// header or a line split between two reads carries over), and calls emit
// for every sample. Reset and End records replay what the live source did.
func (r *Reader) Samples(ctx context.Context, f Filter, progress func(int64), emit ingest.EmitFunc) (SampleStats, error) {
	type dec struct {
		src Source
		d   ingest.Decoder
	}
	decs := map[string]*dec{}
	var order []*dec
	var st SampleStats
	err := r.Records(ctx, f, progress, func(src Source, rec Record) error {
		d := decs[src.Stream]
		if d == nil || d.src != src {
			if d != nil {
				d.d.Flush()
			}
			nd, err := ingest.NewDecoder(src.Format, src.decoderOptions(), emit)
			if err != nil {
				return fmt.Errorf("stream %s: %w", src.Stream, err)
			}
			d = &dec{src: src, d: nd}
			decs[src.Stream] = d
			order = append(order, d)
		}
		switch rec.Kind {
		case KindData:
			_, _ = d.d.Write(rec.Payload)
		case KindReset:
			d.d.Reset()
		case KindEnd:
			d.d.Flush()
		}
		return nil
	})
	for _, d := range order {
		d.d.Flush()
		ds := d.d.Stats()
		st.Decode.Samples += ds.Samples
		st.Decode.BadLines += ds.BadLines
		st.Decode.BadFrames += ds.BadFrames
		st.Decode.SkippedBytes += ds.SkippedBytes
	}
	st.Scan = r.st
	return st, err
}
