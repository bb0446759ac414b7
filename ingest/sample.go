package ingest

import (
	"context"
	"math"
)

// Sample is one measurement of airway pressure and flow, in the internal
// units of the project: seconds, cmH2O and L/s with inspiratory flow positive.
type Sample struct {
	// TimeS is the sample time in seconds on the device's clock (or derived
	// from the sample counter and the declared rate), never the arrival time.
	TimeS float64
	// PressureCmH2O is the airway pressure.
	PressureCmH2O float64
	// FlowLPS is the flow at the airway opening, positive into the patient.
	FlowLPS float64
	// VolumeL is the volume reported by the device, or NaN when absent.
	VolumeL float64
}

// NoVolume is the VolumeL of a sample whose source reports no volume.
var NoVolume = math.NaN()

// Status is a change in the condition of a stream's signal that a source
// reports alongside its samples.
type Status int

const (
	// StatusNone marks an event that carries samples only.
	StatusNone Status = iota
	// StatusConnected reports that the source is reading (again).
	StatusConnected
	// StatusDisconnected reports that the device or connection went away.
	StatusDisconnected
	// StatusGap reports missing samples detected from time stamps or counters.
	StatusGap
)

// String names the status for logs and events.
func (s Status) String() string {
	switch s {
	case StatusConnected:
		return "connected"
	case StatusDisconnected:
		return "disconnected"
	case StatusGap:
		return "gap"
	default:
		return "none"
	}
}

// Event is what a source delivers to its sink: a batch of samples of one
// stream, a status change, or both. Samples is only valid until the sink
// returns; a sink that keeps samples must copy them.
type Event struct {
	// Stream is the stream id (from config, the stream column, or the frame).
	Stream string
	// Samples are in time order.
	Samples []Sample
	// Status is StatusNone for a plain batch of samples.
	Status Status
	// GapS is the length of the gap in seconds when Status is StatusGap.
	GapS float64
	// Err explains a StatusDisconnected; nil otherwise.
	Err error
	// Slot is where a BatchSink may keep its own state of this stream on
	// this connection (see StreamSlot); nil on status events and outside a
	// BatchSink.
	Slot *StreamSlot

	// buf is the pooled memory of Samples handed to a BatchSink.
	buf *[]Sample
}

// StreamSlot holds what a BatchSink keeps of one stream of one connection,
// so that it finds its state for the stream's next events without looking
// the id up: on a link of thousands of streams that lookup, in a map that
// no longer fits the cache, costs more than the rest of routing an event.
// The source keeps the slot as long as the connection, and only the
// reading goroutine, where the BatchSink runs, may touch it.
type StreamSlot struct {
	// V is the sink's own value, nil until the sink sets it.
	V any
}

// Release returns the memory of the event's samples to the source's pool.
// Only a BatchSink calls it, once per event, when it is done with them;
// the samples must not be used afterwards.
func (e *Event) Release() {
	putBatch(e.buf)
	e.buf, e.Samples = nil, nil
}

// BatchSink receives the events of one read (one chunk of a connection, one
// datagram, one message) on the reading goroutine, stream after stream in
// input order. Unlike a Sink it owns the samples of each event until it
// calls Release on it, so it may hand them to another goroutine without a
// copy; the slice evs itself is reused once the call returns. Blocking in
// the sink holds the reading of that link back (what a file or stdin
// wants); a live link's sink should drop and count instead.
type BatchSink func(evs []Event)

// Sink receives events from a source. It is called from the source's own
// goroutine and must not block for long: a slow sink stalls the source.
type Sink func(Event)

// Source reads samples until its context is cancelled. Run returns nil on
// cancellation, and an error only when the source cannot go on at all (for
// example a malformed URL); transient failures such as an unplugged cable are
// reported as StatusDisconnected events and retried with backoff.
type Source interface {
	Run(ctx context.Context, sink Sink) error
	// Stats returns the source's counters so far; safe to call concurrently.
	Stats() Stats
}

// Stats counts what a source read, rejected and dropped.
type Stats struct {
	Samples      uint64 // samples delivered
	BadLines     uint64 // text lines that did not parse, were too long or not finite
	BadFrames    uint64 // binary frames with a bad CRC, version or length
	SkippedBytes uint64 // bytes discarded while resynchronising a binary stream
	Gaps         uint64 // gaps detected from time stamps or counters
	Duplicates   uint64 // samples repeated (same time or sequence)
	OutOfOrder   uint64 // samples older than the last delivered one, dropped
	Dropped      uint64 // samples dropped under overload
	Reconnects   uint64 // times the source reopened its device or connection
	ClockResets  uint64 // times the device time went back beyond the out-of-order window
	RateDrifts   uint64 // episodes of the sample rate drifting from the declared or first measured rate
}

// Encoder writes samples in one of the project's wire formats. The simulator
// and the tests write through the same encoders that the decoders read.
type Encoder interface {
	// Header returns the bytes that open a stream (a header line for the
	// text format); it may be empty.
	Header() []byte
	// Append appends the encoding of one sample of a stream to dst.
	Append(dst []byte, stream string, s Sample) []byte
}
