package record

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"time"
)

// segment is an open segment file of one source stream.
type segment struct {
	Segment
	src   Source
	f     File
	until time.Time // the end of its time window
	dirty bool      // written since the last fsync
}

// disk is the state of the writing goroutine: open segments, the closed
// ones (the index), counters and the error state.
type disk struct {
	opts     Options
	open     map[string]*segment // by source stream
	closed   []Segment           // in order of first record time
	stats    Stats
	buf      []byte
	lastErr  error
	retryAt  time.Time // drop records until then after a write error
	lastSync time.Time
	// overflowUntil keeps the overflow state up for a while after a drop.
	overflowUntil time.Time
	closeErr      error
}

// openDisk adopts the segments already in the directory.
func openDisk(opts Options) (*disk, error) {
	segs, _, err := loadSegments(opts.Dir, nil)
	if err != nil {
		return nil, err
	}
	d := &disk{opts: opts, open: map[string]*segment{}, closed: segs, lastSync: opts.Now()}
	if err := d.writeIndex(); err != nil {
		return nil, err
	}
	return d, nil
}

// failing reports whether records are being dropped after a write error.
func (d *disk) failing(now time.Time) bool {
	return d.lastErr != nil && now.Before(d.retryAt)
}

// footprint returns the number of segment files and their total size.
func (d *disk) footprint() (int, int64) {
	n, b := len(d.closed)+len(d.open), int64(0)
	for _, s := range d.closed {
		b += s.Bytes
	}
	for _, s := range d.open {
		b += s.Bytes
	}
	return n, b
}

// fail records a write error: the records of the next RetryEvery are
// dropped, then the disk is tried again.
func (d *disk) fail(err error) {
	d.stats.WriteErrors++
	d.lastErr = err
	d.retryAt = d.opts.Now().Add(d.opts.RetryEvery)
}

func (d *disk) drop(it item) {
	d.stats.DroppedRecords++
	d.stats.DroppedBytes += uint64(len(it.data))
}

// writeAll writes a batch of reads.
func (d *disk) writeAll(items []item) {
	for _, it := range items {
		d.write(it)
	}
}

// write writes one read into its stream's segment, opening or rolling the
// segment as needed.
func (d *disk) write(it item) {
	if d.failing(d.opts.Now()) {
		d.drop(it)
		return
	}
	seg := d.open[it.src.Stream]
	if seg != nil && (seg.src != it.src || !it.t.Before(seg.until)) {
		d.closeSegment(seg)
		seg = nil
	}
	if seg == nil {
		var err error
		if seg, err = d.create(it.src, it.t); err != nil {
			d.drop(it)
			if !errors.Is(err, errBadSource) {
				d.fail(err)
			}
			return
		}
	}
	d.buf = appendRecord(d.buf[:0], it.kind, it.t, it.data)
	n, err := seg.f.Write(d.buf)
	seg.Bytes += int64(n)
	if err != nil {
		d.drop(it)
		d.fail(fmt.Errorf("write %s: %w", seg.Name, err))
		d.closeSegment(seg) // the tail is cut; the reader skips it
		return
	}
	if seg.Records == 0 {
		seg.First = it.t
	}
	seg.Last = it.t
	seg.Records++
	seg.dirty = true
	d.stats.Records++
	d.stats.Bytes += uint64(len(it.data))
	d.lastErr = nil
}

var errBadSource = errors.New("bad source")

// create opens a new segment for src whose first record arrives at t.
func (d *disk) create(src Source, t time.Time) (*segment, error) {
	if err := src.check(); err != nil {
		return nil, fmt.Errorf("%w: %v", errBadSource, err)
	}
	var f File
	var name string
	var err error
	for n := 0; n < 100; n++ {
		name = segmentName(src.Stream, t, n)
		f, err = d.opts.Create(filepath.Join(d.opts.Dir, name))
		if !errors.Is(err, os.ErrExist) {
			break
		}
	}
	if err != nil {
		return nil, fmt.Errorf("create segment: %w", err)
	}
	seg := &segment{Segment: Segment{Name: name, Stream: src.Stream, Format: src.Format, First: t, Last: t},
		src: src, f: f, until: t.Truncate(d.opts.SegmentLength).Add(d.opts.SegmentLength)}
	d.open[src.Stream] = seg
	d.buf = appendHeader(d.buf[:0], src, t)
	n, err := f.Write(d.buf)
	seg.Bytes = int64(n)
	if err != nil {
		d.closeSegment(seg)
		return nil, fmt.Errorf("write %s: %w", name, err)
	}
	syncDir(d.opts.Dir)
	return seg, nil
}

// closeSegment fsyncs and closes a segment and moves it to the index.
func (d *disk) closeSegment(seg *segment) {
	delete(d.open, seg.Stream)
	err := seg.f.Sync()
	if cerr := seg.f.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		d.fail(fmt.Errorf("close %s: %w", seg.Name, err))
		d.closeErr = err
	}
	d.closed = append(d.closed, seg.Segment)
	sortSegments(d.closed)
	if err := d.writeIndex(); err != nil {
		d.fail(err)
	}
}

// closeAll closes every open segment (at shutdown).
func (d *disk) closeAll() {
	for _, seg := range d.open {
		d.closeSegment(seg)
	}
}

// housekeep closes segments whose window has passed, fsyncs the open ones
// every SyncEvery and applies retention.
func (d *disk) housekeep() {
	now := d.opts.Now()
	for _, seg := range d.open {
		if !now.Before(seg.until) {
			d.closeSegment(seg)
		}
	}
	if now.Sub(d.lastSync) >= d.opts.SyncEvery {
		d.lastSync = now
		for _, seg := range d.open {
			if !seg.dirty {
				continue
			}
			seg.dirty = false
			if err := seg.f.Sync(); err != nil {
				d.fail(fmt.Errorf("sync %s: %w", seg.Name, err))
			}
		}
	}
	d.retain(now)
}

// retain deletes the oldest closed segments while they are older than
// MaxAge or while all segments together exceed MaxBytes. Open segments are
// never deleted, so the total may exceed MaxBytes by what they hold.
func (d *disk) retain(now time.Time) {
	_, total := d.footprint()
	n := 0
	for n < len(d.closed) {
		s := d.closed[n]
		old := d.opts.MaxAge > 0 && now.Sub(s.Last) > d.opts.MaxAge
		big := d.opts.MaxBytes > 0 && total > d.opts.MaxBytes
		if !old && !big {
			break
		}
		if err := os.Remove(filepath.Join(d.opts.Dir, s.Name)); err != nil && !os.IsNotExist(err) {
			d.fail(fmt.Errorf("delete %s: %w", s.Name, err))
			break
		}
		total -= s.Bytes
		d.stats.Deleted++
		n++
	}
	if n == 0 {
		return
	}
	d.closed = append(d.closed[:0], d.closed[n:]...)
	if err := d.writeIndex(); err != nil {
		d.fail(err)
	}
}

// writeIndex replaces the index file: written beside it, fsynced, renamed
// over it, and the directory fsynced.
func (d *disk) writeIndex() error {
	b := []byte(indexHeader)
	for _, s := range d.closed {
		b = appendIndexLine(b, s)
	}
	tmp := filepath.Join(d.opts.Dir, IndexName+".tmp")
	_ = os.Remove(tmp)
	f, err := d.opts.Create(tmp)
	if err != nil {
		return fmt.Errorf("write index: %w", err)
	}
	_, err = f.Write(b)
	if err == nil {
		err = f.Sync()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(tmp, filepath.Join(d.opts.Dir, IndexName))
	}
	if err != nil {
		_ = os.Remove(tmp)
		return fmt.Errorf("write index: %w", err)
	}
	syncDir(d.opts.Dir)
	return nil
}

// syncDir fsyncs a directory so that a new or renamed file survives a
// power loss; where directories cannot be synced it does nothing.
func syncDir(dir string) {
	if f, err := os.Open(dir); err == nil {
		_ = f.Sync()
		_ = f.Close()
	}
}
