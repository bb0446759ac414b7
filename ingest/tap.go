package ingest

// TapKind says what a Tap call reports.
type TapKind uint8

// The kinds of Tap calls: they mirror what a source does to its decoder, so
// that a recorder can replay a byte stream exactly as it was decoded live.
const (
	// TapData carries bytes as read from the device or connection.
	TapData TapKind = iota
	// TapReset reports that the link dropped: a partial line or frame is
	// discarded.
	TapReset
	// TapEnd reports the end of an input (a file, a datagram, a message):
	// a last line without a newline is decoded.
	TapEnd
)

// TapSource describes the byte stream of a Tap call: everything needed to
// decode its bytes again as the source did.
type TapSource struct {
	// Stream is the default stream id of the byte stream (text input with
	// a stream column, and binary frames, may name others inside).
	Stream string
	// Format is the wire format.
	Format Format
	// Columns is the text layout of input without a header line.
	Columns string
	// RateHz is the declared sample rate (0 = none).
	RateHz float64
}

// Tap receives the raw bytes of a source before they are decoded, from the
// source's reading goroutine. It must not block and must not keep p after
// it returns (a recorder copies it).
type Tap func(src TapSource, kind TapKind, p []byte)

// tap hands what happens to the decoder to Options.Tap.
func (c *conn) tap(k TapKind, p []byte) {
	if t := c.s.opts.Tap; t != nil {
		o := c.s.opts
		t(TapSource{Stream: c.defStream, Format: o.Format, Columns: o.Columns, RateHz: o.RateHz}, k, p)
	}
}
