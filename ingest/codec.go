package ingest

import (
	"errors"
	"fmt"
	"io"
)

// Format names a wire format of the samples.
type Format string

// The wire formats.
const (
	// FormatText is the sample line format v1 (docs/framing.md).
	FormatText Format = "text"
	// FormatBinary is the binary framing (docs/framing.md).
	FormatBinary Format = "binary"
)

// ParseFormat checks a format name; the empty name is FormatText.
func ParseFormat(s string) (Format, error) {
	switch Format(s) {
	case "", FormatText:
		return FormatText, nil
	case FormatBinary:
		return FormatBinary, nil
	}
	return "", fmt.Errorf("format %q: want text or binary", s)
}

// DefaultStream is the stream id of samples that name no stream when the
// configuration gives none.
const DefaultStream = "default"

// DefaultColumns is the column layout of text input without a header line.
const DefaultColumns = "time[s],pressure[cmH2O],flow[L/min]"

// EmitFunc receives one decoded sample. stream is interned by the decoder
// and may be kept; the call must not block for long.
type EmitFunc func(stream string, s Sample)

// RunFunc receives decoded samples of one stream, in input order. The
// slice is the decoder's: valid only during the call, and the callee may
// change it.
type RunFunc func(stream string, ss []Sample)

// DecoderOptions configure a decoder.
type DecoderOptions struct {
	// Columns is the text layout used until a header line arrives, such as
	// "time[s],pressure[cmH2O],flow[L/min]" (DefaultColumns when empty).
	Columns string
	// RateHz is the declared sample rate: the time of input without a time
	// column (text) or without device timestamps and a rate of its own
	// (binary) is the per-stream sample index divided by RateHz.
	RateHz float64
	// Stream is the stream id of samples that name none (DefaultStream when
	// empty).
	Stream string
	// Runs, when set, receives the samples of the text decoder's fast
	// lane (ordinary sample lines without a stream column) in runs, one
	// call for many samples, rather than one at a time through the
	// EmitFunc, which still receives every other sample. Both together
	// keep the input order. A reader that takes samples in runs (the
	// analyze verb) saves a call and a copy per sample.
	Runs RunFunc
}

// DecoderStats counts what a decoder accepted and rejected.
type DecoderStats struct {
	Samples      uint64 // samples emitted
	BadLines     uint64 // text lines that did not parse, were too long or not finite
	BadFrames    uint64 // binary: stretches of input that were not valid frames (one per resynchronisation)
	SkippedBytes uint64 // binary: bytes discarded while resynchronising
}

// Decoder turns a byte stream into samples. It is fed with Write, in pieces
// of any size (a partial line or frame is kept until the rest arrives), and
// calls its EmitFunc once per decoded sample. Write never fails: bad input is
// counted and skipped. A Decoder is not safe for concurrent use.
type Decoder interface {
	io.Writer
	// Flush decodes what is left at the end of the input (a last line without
	// a newline); the decoder can then be fed a new stream.
	Flush()
	// Reset drops a partial line or frame without decoding it (the link
	// went down in the middle of it), counting it as bad; the layout and the
	// per-stream counters stay.
	Reset()
	// Stats returns the counters so far.
	Stats() DecoderStats
	// Err returns the configuration problem found in the input (a header with
	// an unknown unit), or nil; samples are rejected while it is set.
	Err() error
}

// NewDecoder returns the decoder of a format.
func NewDecoder(f Format, opts DecoderOptions, emit EmitFunc) (Decoder, error) {
	switch f {
	case FormatText, "":
		return NewTextDecoder(opts, emit)
	case FormatBinary:
		return NewBinaryDecoder(opts, emit)
	}
	return nil, fmt.Errorf("format %q: want text or binary", f)
}

// Decode feeds everything r yields into d and flushes it at the end. It is
// the whole reading loop of `trapline analyze FILE`: a file or stdin needs
// no source, no pacing and no reconnection.
func Decode(r io.Reader, d Decoder) error {
	buf := make([]byte, 64<<10)
	for {
		n, err := r.Read(buf)
		if n > 0 {
			_, _ = d.Write(buf[:n])
		}
		if errors.Is(err, io.EOF) {
			d.Flush()
			return nil
		}
		if err != nil {
			d.Flush()
			return fmt.Errorf("read: %w", err)
		}
	}
}

// maxStreamID is the longest stream id accepted from input.
const maxStreamID = 32

// maxStreams bounds the number of distinct stream ids a decoder remembers,
// so that hostile input cannot grow its memory without limit.
const maxStreams = 1024

// validStreamID reports whether b may be a stream id: 1 to 32 characters
// among letters, digits, '-' and '_', so that it is also a valid token of a
// NATS subject.
func validStreamID(b []byte) bool {
	if len(b) == 0 || len(b) > maxStreamID {
		return false
	}
	for _, c := range b {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '-' || c == '_') {
			return false
		}
	}
	return true
}

// ValidStreamID reports whether s may be a stream id (see the text format).
func ValidStreamID(s string) bool { return validStreamID([]byte(s)) }

// streamState is what a decoder keeps per stream.
type streamState struct {
	id string
	// n counts the samples decoded (text) or holds the unwrapped sequence
	// counter of the next sample (binary).
	n       int64
	started bool
	// shape is the line shape its last text line had (text_shape.go), the
	// first one tried for its next.
	shape uint8
	// next is the stream whose sample followed this one's last time: a
	// link of many streams repeats their order, so it is usually the next.
	next *streamState
}

// streamTable interns stream ids without allocating for ids already seen.
type streamTable struct {
	def  *streamState
	last *streamState
	m    map[string]*streamState
}

func newStreamTable(def string) streamTable {
	d := &streamState{id: def}
	return streamTable{def: d, last: d, m: map[string]*streamState{def: d}}
}

// get returns the state of stream b, the default stream when b is empty, or
// nil when b is not a valid id or the table is full.
func (t *streamTable) get(b []byte) *streamState {
	if len(b) == 0 {
		return t.def
	}
	// The stream that followed the last one first (as in StreamIndex.Get).
	if n := t.last.next; n != nil && string(b) == n.id {
		t.last = n
		return n
	}
	if string(b) == t.last.id {
		return t.last
	}
	s, ok := t.m[string(b)]
	if !ok {
		if !validStreamID(b) || len(t.m) >= maxStreams {
			return nil
		}
		s = &streamState{id: string(b)}
		t.m[s.id] = s
	}
	t.last.next, t.last = s, s
	return s
}
