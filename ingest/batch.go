package ingest

// Batch holds decoded samples in input order and the stream of each: the
// unit in which a multiplexed source (several stream ids on one link) hands
// its input on. A Batch is reused: Reset empties it and keeps its memory.
type Batch struct {
	// Samples are in input order, which is time order within each stream.
	Samples []Sample
	// Streams[i] is the stream of Samples[i], as an index into IDs.
	Streams []int32
	// IDs names the streams by index. The decoder that fills the batch only
	// ever appends to it, so an index names the same stream for the life of
	// the decoder, and a batch handed to another goroutine may keep its IDs.
	IDs []string
}

// Len returns the number of samples in the batch.
func (b *Batch) Len() int { return len(b.Samples) }

// Reset empties the batch and keeps its memory and its IDs.
func (b *Batch) Reset() {
	b.Samples = b.Samples[:0]
	b.Streams = b.Streams[:0]
}

// add appends one sample of stream index x.
func (b *Batch) add(x int32, s Sample) {
	b.Samples = append(b.Samples, s)
	b.Streams = append(b.Streams, x)
}

// BatchDecoder decodes bytes into batches: a Decoder whose samples are
// appended, with the index of their stream, to the Batch given to each
// call instead of being passed one at a time to a callback. Its stream
// indexes are dense (0, 1, 2, ... in order of first appearance), so a
// reader keeps per-stream state in a slice rather than a map. A
// BatchDecoder is not safe for concurrent use.
type BatchDecoder struct {
	dec   Decoder
	into  *Batch
	ids   []string
	index StreamIndex[int32]
}

// NewBatchDecoder returns a batch decoder of a format; see NewDecoder.
func NewBatchDecoder(f Format, opts DecoderOptions) (*BatchDecoder, error) {
	d := &BatchDecoder{}
	dec, err := NewDecoder(f, opts, d.emit)
	if err != nil {
		return nil, err
	}
	d.dec = dec
	return d, nil
}

// emit is the decoder's callback. Stream ids come interned from the
// decoder, so the comparisons of StreamIndex are usually pointer checks.
func (d *BatchDecoder) emit(stream string, s Sample) {
	x, ok := d.index.Get(stream)
	if !ok {
		x = int32(len(d.ids))
		d.ids = append(d.ids, stream)
		d.index.Put(stream, x)
		d.into.IDs = d.ids
	}
	d.into.add(x, s)
}

// Decode decodes p and appends its complete samples to into; a partial
// line or frame at the end is kept for the next call.
func (d *BatchDecoder) Decode(into *Batch, p []byte) {
	d.into = into
	into.IDs = d.ids
	_, _ = d.dec.Write(p)
	d.into = nil
}

// Flush decodes what is left at the end of the input into into.
func (d *BatchDecoder) Flush(into *Batch) {
	d.into = into
	into.IDs = d.ids
	d.dec.Flush()
	d.into = nil
}

// Reset drops a partial line or frame (the link went down in the middle of
// it), counting it as bad.
func (d *BatchDecoder) Reset() { d.dec.Reset() }

// IDs returns the stream ids seen so far, by index.
func (d *BatchDecoder) IDs() []string { return d.ids }

// Stats returns the decoder's counters.
func (d *BatchDecoder) Stats() DecoderStats { return d.dec.Stats() }

// Err returns the configuration problem found in the input, or nil (see
// Decoder).
func (d *BatchDecoder) Err() error { return d.dec.Err() }

// Span is the samples of one stream within a batch, in time order.
type Span struct {
	// Index is the stream's index in the batch's IDs.
	Index int32
	// Stream is the stream id.
	Stream string
	// Samples are valid until the next Split of the Demux that made the
	// span, and, for a span over the batch itself, until the batch is
	// reused.
	Samples []Sample
}

// Demux groups the samples of a batch by stream. It is what routes one
// multiplexed source to per-stream pipelines: one Split per batch, one call
// per stream, instead of one call per sample. A Demux reuses its memory, so
// that splitting allocates nothing once it has seen the largest batch and
// the most streams. A Demux is not safe for concurrent use.
type Demux struct {
	spans   []Span
	counts  []int
	pos     []int32 // per stream index: its span in spans, or -1
	grouped []Sample
}

// Split returns the samples of b grouped by stream: one span per stream, in
// the order of each stream's first sample in the batch, each in input
// order. When every stream's samples are already consecutive in the batch
// (always so for a source of one stream, and for binary frames of one
// stream each) the spans point into b.Samples and nothing is copied;
// otherwise the samples are copied once, stably, into a buffer the Demux
// keeps. The result is valid until the next call.
func (m *Demux) Split(b *Batch) []Span {
	m.spans, m.counts = m.spans[:0], m.counts[:0]
	for len(m.pos) < len(b.IDs) {
		m.pos = append(m.pos, -1)
	}
	runs := 0
	prev := int32(-1)
	for _, x := range b.Streams {
		if x == prev {
			m.counts[m.pos[x]]++
			continue
		}
		runs++
		prev = x
		if m.pos[x] < 0 {
			m.pos[x] = int32(len(m.spans))
			m.spans = append(m.spans, Span{Index: x, Stream: b.IDs[x]})
			m.counts = append(m.counts, 0)
		}
		m.counts[m.pos[x]]++
	}
	src := b.Samples
	if runs != len(m.spans) {
		m.scatter(b)
		src = m.grouped
	}
	off := 0
	for k := range m.spans {
		n := m.counts[k]
		m.spans[k].Samples = src[off : off+n : off+n]
		off += n
		m.pos[m.spans[k].Index] = -1
	}
	return m.spans
}

// scatter copies the samples of b into m.grouped, stream after stream in
// the order of m.spans, keeping each stream's order (a counting sort).
func (m *Demux) scatter(b *Batch) {
	if cap(m.grouped) < len(b.Samples) {
		m.grouped = make([]Sample, len(b.Samples), 2*len(b.Samples))
	}
	m.grouped = m.grouped[:len(b.Samples)]
	// counts become the next free position of each span.
	off := 0
	for k, n := range m.counts {
		m.counts[k] = off
		off += n
	}
	for i, x := range b.Streams {
		k := m.pos[x]
		m.grouped[m.counts[k]] = b.Samples[i]
		m.counts[k]++
	}
	// Back to counts: each span's end minus the previous span's end.
	prevEnd := 0
	for k, end := range m.counts {
		m.counts[k] = end - prevEnd
		prevEnd = end
	}
}
