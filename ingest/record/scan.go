package record

import (
	"bufio"
	"errors"
	"fmt"
	"io"
	"os"
	"time"
)

// ScanStats counts what reading segments found.
type ScanStats struct {
	Segments     int    // segment files read
	Records      uint64 // valid records read
	Bytes        uint64 // payload bytes of the valid records
	BadSegments  int    // files with a missing or damaged header, skipped whole
	Truncated    int    // segments that end inside a record (a write cut short)
	Corrupt      int    // segments with a record whose length or CRC is wrong
	SkippedBytes uint64 // bytes after a truncated or corrupt record, not read
}

func (s *ScanStats) add(o ScanStats) {
	s.Segments += o.Segments
	s.Records += o.Records
	s.Bytes += o.Bytes
	s.BadSegments += o.BadSegments
	s.Truncated += o.Truncated
	s.Corrupt += o.Corrupt
	s.SkippedBytes += o.SkippedBytes
}

// segmentScanner reads the records of one segment in order.
type segmentScanner struct {
	r    *bufio.Reader
	buf  []byte
	head segmentHeader
	st   ScanStats
}

// newScanner reads the header of a segment from r.
func newScanner(r io.Reader) (*segmentScanner, error) {
	s := &segmentScanner{r: bufio.NewReaderSize(r, 64<<10)}
	b, err := s.r.Peek(fixedHeaderLen)
	if err != nil {
		return nil, ErrNotSegment
	}
	want := fixedHeaderLen + int(b[13]) + int(uint16(b[26])|uint16(b[27])<<8) + crcLen
	if want > maxHeaderLen {
		return nil, fmt.Errorf("%w: bad header length", ErrNotSegment)
	}
	b, err = s.r.Peek(want)
	if err != nil {
		return nil, fmt.Errorf("%w: header cut short", ErrNotSegment)
	}
	if s.head, err = parseHeader(b); err != nil {
		return nil, err
	}
	_, _ = s.r.Discard(s.head.Len)
	return s, nil
}

// next returns the next valid record, or io.EOF at the end of the segment
// or at the first damaged record (counted in st).
func (s *segmentScanner) next() (Record, error) {
	var head [recordHeadLen]byte
	n, err := io.ReadFull(s.r, head[:])
	if n == 0 && errors.Is(err, io.EOF) {
		return Record{}, io.EOF
	}
	if err != nil {
		return s.damaged(errTruncated, uint64(n))
	}
	size := recordLen(int(uint32(head[0]) | uint32(head[1])<<8 | uint32(head[2])<<16 | uint32(head[3])<<24))
	if size-recordHeadLen-crcLen > MaxPayload {
		return s.damaged(errCorrupt, recordHeadLen)
	}
	if cap(s.buf) < size {
		s.buf = make([]byte, size)
	}
	s.buf = s.buf[:size]
	copy(s.buf, head[:])
	m, err := io.ReadFull(s.r, s.buf[recordHeadLen:])
	if err != nil {
		return s.damaged(errTruncated, uint64(recordHeadLen+m))
	}
	rec, _, err := parseRecord(s.buf)
	if err != nil {
		return s.damaged(err, uint64(size))
	}
	s.st.Records++
	s.st.Bytes += uint64(len(rec.Payload))
	return rec, nil
}

// damaged counts a damaged record and what follows it, and ends the
// segment: without a sync marker the next record boundary is unknown.
func (s *segmentScanner) damaged(kind error, consumed uint64) (Record, error) {
	rest, _ := io.Copy(io.Discard, s.r)
	s.st.SkippedBytes += consumed + uint64(rest)
	if errors.Is(kind, errTruncated) {
		s.st.Truncated++
	} else {
		s.st.Corrupt++
	}
	return Record{}, io.EOF
}

// segmentSummary is what a scan of a whole segment file tells.
type segmentSummary struct {
	head        segmentHeader
	first, last time.Time
	records     uint64
	bytes       int64 // file size
}

// summarize reads a whole segment file: its header, first and last record
// times and record count.
func summarize(path string) (segmentSummary, ScanStats, error) {
	f, err := os.Open(path)
	if err != nil {
		return segmentSummary{}, ScanStats{}, fmt.Errorf("open segment: %w", err)
	}
	defer f.Close()
	fi, err := f.Stat()
	if err != nil {
		return segmentSummary{}, ScanStats{}, fmt.Errorf("stat segment: %w", err)
	}
	sc, err := newScanner(f)
	if err != nil {
		return segmentSummary{}, ScanStats{BadSegments: 1}, fmt.Errorf("%s: %w", path, err)
	}
	sum := segmentSummary{head: sc.head, bytes: fi.Size()}
	for {
		rec, err := sc.next()
		if err != nil {
			break
		}
		if sum.records == 0 {
			sum.first = rec.Time
		}
		sum.last = rec.Time
		sum.records++
	}
	sc.st.Segments = 1
	return sum, sc.st, nil
}
