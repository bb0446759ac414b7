package ingest

// StreamIndex holds a value for each stream id. Input of many streams
// repeats their order (a connection's streams, a ward recording's lines),
// so the stream asked for is nearly always the one asked for last or the
// one that followed it last time: both are found by comparing ids (the
// same string, usually, so no bytes are compared) instead of hashing the
// id for a map lookup on every sample.
type StreamIndex[V any] struct {
	m    map[string]*indexEntry[V]
	last *indexEntry[V]
}

type indexEntry[V any] struct {
	id   string
	v    V
	next *indexEntry[V] // the stream asked for after this one last time
}

// Get returns the value of stream id, and false when it has none.
func (x *StreamIndex[V]) Get(id string) (V, bool) {
	if e := x.last; e != nil {
		// The stream that followed first: on input of many streams it is
		// the one, and comparing it with the last one's id first would
		// compare the bytes of two ids of the same length.
		if n := e.next; n != nil && n.id == id {
			x.last = n
			return n.v, true
		}
		if e.id == id {
			return e.v, true
		}
	}
	e := x.m[id]
	if e == nil {
		var zero V
		return zero, false
	}
	x.follow(e)
	return e.v, true
}

// Put sets the value of stream id (a new stream) and makes it the one
// asked for last.
func (x *StreamIndex[V]) Put(id string, v V) {
	if x.m == nil {
		x.m = map[string]*indexEntry[V]{}
	}
	e := &indexEntry[V]{id: id, v: v}
	x.m[id] = e
	x.follow(e)
}

// follow makes e the stream asked for last, after the one before it.
func (x *StreamIndex[V]) follow(e *indexEntry[V]) {
	if x.last != nil {
		x.last.next = e
	}
	x.last = e
}
