package record

import (
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"time"

	"trapline/ingest"
)

// The segment file format, version 1 (docs/recording.md has it byte by
// byte). All integers are little-endian.
//
//	segment header
//	offset size field
//	0      8    magic 0x89 'T' 'L' 'R' 'E' 'C' '\r' '\n'
//	8      2    version (1)
//	10     2    H, header length in bytes, CRC included
//	12     1    format: 0 text, 1 binary
//	13     1    S, stream id length (1..32)
//	14     4    declared sample rate in mHz (uint32; 0 = none)
//	18     8    creation wall time, Unix nanoseconds (int64)
//	26     2    C, column layout length (0..1024)
//	28     S    stream id
//	28+S   C    column layout (text sources; may be empty)
//	H-4    4    CRC-32C of bytes 0 .. H-5
//
//	record (repeated to the end of the file)
//	0      4    L, payload length (uint32, at most MaxPayload)
//	4      1    kind: 0 data, 1 reset, 2 end
//	5      8    receive wall time, Unix nanoseconds (int64)
//	13     L    payload: the bytes as read from the source
//	13+L   4    CRC-32C of bytes 0 .. 12+L
const (
	version        = 1
	fixedHeaderLen = 28
	crcLen         = 4
	recordHeadLen  = 13
	// MaxPayload is the largest payload of one record; longer reads are
	// split by the writer.
	MaxPayload = 1 << 20
	// maxColumns bounds the column layout kept in a segment header.
	maxColumns = 1024
	// SegmentExt ends the name of every segment file.
	SegmentExt = ".trseg"
)

// magic opens every segment file. The high first byte and the CR LF pair
// reveal a file that went through a text-mode transfer.
var magic = [8]byte{0x89, 'T', 'L', 'R', 'E', 'C', '\r', '\n'}

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

// Kind says what a record holds.
type Kind uint8

// The record kinds. Reset and End replay what the source did to its decoder
// when a link dropped in the middle of a line or frame, or an input ended.
const (
	// KindData carries bytes as read from the source.
	KindData Kind = 0
	// KindReset marks a dropped link: a partial line or frame is discarded.
	KindReset Kind = 1
	// KindEnd marks the end of an input: a last line without a newline is
	// decoded.
	KindEnd Kind = 2
)

// Source describes one recorded byte stream: what a reader needs to decode
// its bytes again as the live source did.
type Source struct {
	// Stream is the source's stream id (the default stream of its decoder;
	// text input with a stream column may name other streams inside).
	Stream string
	// Format is the wire format of the bytes.
	Format ingest.Format
	// Columns is the text layout of input without a header line.
	Columns string
	// RateHz is the declared sample rate (0 = none).
	RateHz float64
}

// decoderOptions returns the options that decode this source's bytes.
func (s Source) decoderOptions() ingest.DecoderOptions {
	return ingest.DecoderOptions{Columns: s.Columns, RateHz: s.RateHz, Stream: s.Stream}
}

// check reports why a source cannot be recorded.
func (s Source) check() error {
	switch {
	case !ingest.ValidStreamID(s.Stream):
		return fmt.Errorf("stream id %q is not valid", s.Stream)
	case s.Format != ingest.FormatText && s.Format != ingest.FormatBinary:
		return fmt.Errorf("stream %s: format %q: want text or binary", s.Stream, s.Format)
	case len(s.Columns) > maxColumns:
		return fmt.Errorf("stream %s: column layout longer than %d bytes", s.Stream, maxColumns)
	case !(s.RateHz >= 0 && s.RateHz*1000 < 1<<32):
		return fmt.Errorf("stream %s: rate %g Hz out of range", s.Stream, s.RateHz)
	}
	return nil
}

// segmentHeader is the decoded header of a segment file.
type segmentHeader struct {
	Source
	Created time.Time
	Len     int // header length in bytes
}

// appendHeader appends the encoded segment header of src created at t.
func appendHeader(dst []byte, src Source, t time.Time) []byte {
	start := len(dst)
	dst = append(dst, magic[:]...)
	dst = binary.LittleEndian.AppendUint16(dst, version)
	dst = binary.LittleEndian.AppendUint16(dst, uint16(fixedHeaderLen+len(src.Stream)+len(src.Columns)+crcLen))
	f := byte(0)
	if src.Format == ingest.FormatBinary {
		f = 1
	}
	dst = append(dst, f, byte(len(src.Stream)))
	dst = binary.LittleEndian.AppendUint32(dst, uint32(src.RateHz*1000+0.5))
	dst = binary.LittleEndian.AppendUint64(dst, uint64(t.UnixNano()))
	dst = binary.LittleEndian.AppendUint16(dst, uint16(len(src.Columns)))
	dst = append(dst, src.Stream...)
	dst = append(dst, src.Columns...)
	return binary.LittleEndian.AppendUint32(dst, crc32.Checksum(dst[start:], castagnoli))
}

// Errors of segment files.
var (
	// ErrNotSegment is returned for a file that does not start with a valid
	// segment header.
	ErrNotSegment = errors.New("not a recording segment")
	// errTruncated marks a record cut short by the end of the file.
	errTruncated = errors.New("truncated record")
	// errCorrupt marks a record whose length or CRC is wrong.
	errCorrupt = errors.New("corrupt record")
)

// parseHeader decodes a segment header from the start of b; it needs the
// whole header (at most fixedHeaderLen+32+maxColumns+4 bytes).
func parseHeader(b []byte) (segmentHeader, error) {
	var h segmentHeader
	if len(b) < fixedHeaderLen+crcLen || [8]byte(b[:8]) != magic {
		return h, ErrNotSegment
	}
	if v := binary.LittleEndian.Uint16(b[8:]); v != version {
		return h, fmt.Errorf("%w: version %d, want %d", ErrNotSegment, v, version)
	}
	n := int(binary.LittleEndian.Uint16(b[10:]))
	s, c := int(b[13]), int(binary.LittleEndian.Uint16(b[26:]))
	if n != fixedHeaderLen+s+c+crcLen || c > maxColumns || len(b) < n {
		return h, fmt.Errorf("%w: bad header length", ErrNotSegment)
	}
	if crc32.Checksum(b[:n-crcLen], castagnoli) != binary.LittleEndian.Uint32(b[n-crcLen:]) {
		return h, fmt.Errorf("%w: header CRC mismatch", ErrNotSegment)
	}
	switch b[12] {
	case 0:
		h.Format = ingest.FormatText
	case 1:
		h.Format = ingest.FormatBinary
	default:
		return h, fmt.Errorf("%w: unknown format %d", ErrNotSegment, b[12])
	}
	h.Stream = string(b[fixedHeaderLen : fixedHeaderLen+s])
	if !ingest.ValidStreamID(h.Stream) {
		return h, fmt.Errorf("%w: bad stream id", ErrNotSegment)
	}
	h.Columns = string(b[fixedHeaderLen+s : fixedHeaderLen+s+c])
	h.RateHz = float64(binary.LittleEndian.Uint32(b[14:])) / 1000
	h.Created = time.Unix(0, int64(binary.LittleEndian.Uint64(b[18:]))).UTC()
	h.Len = n
	return h, nil
}

// maxHeaderLen is the longest valid segment header.
const maxHeaderLen = fixedHeaderLen + 32 + maxColumns + crcLen

// appendRecord appends one framed record.
func appendRecord(dst []byte, k Kind, t time.Time, payload []byte) []byte {
	start := len(dst)
	dst = binary.LittleEndian.AppendUint32(dst, uint32(len(payload)))
	dst = append(dst, byte(k))
	dst = binary.LittleEndian.AppendUint64(dst, uint64(t.UnixNano()))
	dst = append(dst, payload...)
	return binary.LittleEndian.AppendUint32(dst, crc32.Checksum(dst[start:], castagnoli))
}

// recordLen is the framed size of a record with n payload bytes.
func recordLen(n int) int { return recordHeadLen + n + crcLen }

// Record is one recorded read of a source.
type Record struct {
	// Kind says whether the record carries data or a decoder event.
	Kind Kind
	// Time is the wall time at which the bytes were received.
	Time time.Time
	// Payload is the bytes as read; valid until the next record.
	Payload []byte
}

// parseRecord decodes the record at the start of b. It returns the record
// and its framed length, errTruncated when b ends inside it, or errCorrupt.
func parseRecord(b []byte) (Record, int, error) {
	if len(b) < recordHeadLen {
		return Record{}, 0, errTruncated
	}
	n := binary.LittleEndian.Uint32(b)
	if n > MaxPayload || Kind(b[4]) > KindEnd || (Kind(b[4]) != KindData && n != 0) {
		return Record{}, 0, errCorrupt
	}
	total := recordLen(int(n))
	if len(b) < total {
		return Record{}, 0, errTruncated
	}
	if crc32.Checksum(b[:total-crcLen], castagnoli) != binary.LittleEndian.Uint32(b[total-crcLen:]) {
		return Record{}, 0, errCorrupt
	}
	r := Record{
		Kind:    Kind(b[4]),
		Time:    time.Unix(0, int64(binary.LittleEndian.Uint64(b[5:]))).UTC(),
		Payload: b[recordHeadLen : recordHeadLen+int(n)],
	}
	return r, total, nil
}
