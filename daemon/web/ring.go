package web

// ring keeps the last limit values pushed, numbered from 0 in push order.
// It grows up to limit and then overwrites the oldest value, so that a
// stream's display data has a fixed ceiling however long it runs. A reader
// asks for the values from a number on (since): the hub remembers how far
// it has sent and gets only what is new.
type ring[T any] struct {
	buf   []T
	limit int
	base  uint64 // number of the first value after the last reset
	total uint64 // number of values ever pushed
}

func newRing[T any](limit int) ring[T] {
	return ring[T]{limit: max(limit, 1)}
}

func (r *ring[T]) push(v T) {
	if len(r.buf) < r.limit {
		if len(r.buf) == cap(r.buf) { // grow, but never past the limit
			nb := make([]T, len(r.buf), min(max(2*cap(r.buf), 64), r.limit))
			copy(nb, r.buf)
			r.buf = nb
		}
		r.buf = append(r.buf, v)
	} else {
		r.buf[(r.total-r.base)%uint64(r.limit)] = v
	}
	r.total++
}

// reset forgets the values held; numbering goes on.
func (r *ring[T]) reset() {
	r.buf = r.buf[:0]
	r.base = r.total
}

// oldest returns the number of the oldest value still held.
func (r *ring[T]) oldest() uint64 { return r.total - uint64(len(r.buf)) }

// at returns the value numbered i, which must be held.
func (r *ring[T]) at(i uint64) T {
	return r.buf[(i-r.base)%uint64(r.limit)]
}

// each calls f with the values numbered from..upto-1 that are still held,
// oldest first.
func (r *ring[T]) each(from, upto uint64, f func(*T)) {
	from = max(from, r.oldest())
	upto = min(upto, r.total)
	for i := from; i < upto; i++ {
		v := r.at(i)
		f(&v)
	}
}
