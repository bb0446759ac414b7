// Package input opens whatever `trapline analyze` is given — a file or stdin
// in the sample line format or the binary framing, or a recording directory
// — and reads it as one stream of samples with their stream ids, reporting
// progress in bytes.
package input

import (
	"bufio"
	"bytes"
	"errors"
	"fmt"
	"io"
	"os"

	"trapline/ingest"
	"trapline/ingest/record"
)

// Kind is the kind of an input.
type Kind string

// The input kinds.
const (
	// KindAuto detects the kind (the default).
	KindAuto Kind = ""
	// KindText is the sample line format v1.
	KindText Kind = "text"
	// KindBinary is the binary framing v1.
	KindBinary Kind = "binary"
	// KindRecording is a recording directory (docs/recording.md).
	KindRecording Kind = "recording"
)

// ParseKind checks a --format value: auto (or empty), text, binary or
// recording.
func ParseKind(s string) (Kind, error) {
	switch Kind(s) {
	case "auto", KindAuto:
		return KindAuto, nil
	case KindText, KindBinary, KindRecording:
		return Kind(s), nil
	}
	return "", fmt.Errorf("format %q: want auto, text, binary or recording", s)
}

// Options configure Open.
type Options struct {
	// Kind forces the kind of the input; KindAuto detects it.
	Kind Kind
	// Decoder configures the decoding of a text or binary file (columns,
	// rate, default stream). Recordings carry their own.
	Decoder ingest.DecoderOptions
	// Filter chooses the streams and time range of a recording.
	Filter record.Filter
	// Stdin is what the path "-" reads; nil means os.Stdin.
	Stdin io.Reader
	// Progress, when not nil, is called as bytes are read with the bytes
	// done so far and the total (-1 when unknown, as for stdin).
	Progress func(done, total int64)
}

// Stats says what Run read.
type Stats struct {
	Kind   Kind
	Decode ingest.DecoderStats
	// Scan counts damaged segments of a recording.
	Scan record.ScanStats
}

// Input is an opened input, read once by Run.
type Input struct {
	kind  Kind
	name  string
	opts  Options
	file  *os.File // nil for stdin and recordings
	r     *bufio.Reader
	rec   *record.Reader
	total int64
}

// detectBytes is how much of a file detection looks at.
const detectBytes = 8 << 10

// Open opens path ("-" for stdin) and finds its kind, unless opts.Kind
// forces one.
func Open(path string, opts Options) (*Input, error) {
	in := &Input{name: path, opts: opts, kind: opts.Kind, total: -1}
	if path == "-" {
		in.name = "stdin"
		src := opts.Stdin
		if src == nil {
			src = os.Stdin
		}
		in.r = bufio.NewReaderSize(src, 64<<10)
		return in, in.detect()
	}
	fi, err := os.Stat(path)
	if err != nil {
		return nil, fmt.Errorf("open input: %w", err)
	}
	if fi.IsDir() {
		return in, in.openRecording(path)
	}
	if opts.Kind == KindRecording {
		return nil, fmt.Errorf("open %s: a recording is a directory", path)
	}
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("open input: %w", err)
	}
	in.file, in.total = f, fi.Size()
	in.r = bufio.NewReaderSize(f, 64<<10)
	if err := in.detect(); err != nil {
		_ = f.Close()
		return nil, err
	}
	return in, nil
}

func (in *Input) openRecording(dir string) error {
	if in.kind != KindAuto && in.kind != KindRecording {
		return fmt.Errorf("open %s: a directory can only be a recording, not %s", dir, in.kind)
	}
	if !record.IsRecording(dir) {
		return fmt.Errorf("open %s: not a recording (no %s and no *%s files)", dir, record.IndexName, record.SegmentExt)
	}
	r, err := record.OpenReader(dir)
	if err != nil {
		return err
	}
	in.kind, in.rec, in.total = KindRecording, r, r.Size(in.opts.Filter)
	return nil
}

// detect finds the kind of a byte stream from its first bytes.
func (in *Input) detect() error {
	head, err := in.r.Peek(detectBytes)
	if err != nil && !errors.Is(err, io.EOF) && !errors.Is(err, bufio.ErrBufferFull) {
		return fmt.Errorf("read %s: %w", in.name, err)
	}
	if bytes.HasPrefix(head, []byte{0x89, 'T', 'L', 'R', 'E', 'C'}) {
		return fmt.Errorf("read %s: a recording segment file: give its directory", in.name)
	}
	if in.kind == KindAuto {
		in.kind = Detect(head, in.opts.Decoder)
	}
	if in.kind == KindRecording {
		return fmt.Errorf("read %s: a recording is a directory", in.name)
	}
	return nil
}

// Detect tells the binary framing from text by the first bytes of an
// input: it is binary when a binary decoder finds a valid frame (sync
// bytes, header and CRC-32C all check) in them, text otherwise.
func Detect(head []byte, opts ingest.DecoderOptions) Kind {
	if opts.RateHz <= 0 {
		opts.RateHz = 1 // time frames that declare no rate, for this test only
	}
	found := false
	d, err := ingest.NewBinaryDecoder(opts, func(string, ingest.Sample) { found = true })
	if err != nil {
		return KindText
	}
	_, _ = d.Write(head)
	if found {
		return KindBinary
	}
	return KindText
}

// Kind returns the kind of the input, detected or forced.
func (in *Input) Kind() Kind { return in.kind }

// Size returns the bytes to read, or -1 when unknown (stdin).
func (in *Input) Size() int64 { return in.total }

// Close releases the input's file.
func (in *Input) Close() error {
	if in.file != nil {
		return in.file.Close()
	}
	return nil
}
