package ingest

import (
	"bytes"
	"encoding/binary"
	"math"
)

// fastLines decodes the data lines at the start of p that take the fast
// lane, and returns how many bytes they took; it stops at the first line
// that does not, which the general path (line) then reads. A line takes the
// fast lane when the layout's first columns are all numbers (no stream or
// ignored column before the last one needed), each of its needed fields is
// a number of fastLine's form, after at most one blank, followed directly
// by a comma, the last one by "\n" or "\r\n". Such a line decodes here to
// what line would make of it, without finding its end first and without
// the general path's checks for other blanks, comments, headers and empty
// fields, which it cannot have. A layout that starts with a stream column
// takes fastStreamLines.
func (d *TextDecoder) fastLines(p []byte) int {
	if d.layout.cols[0].kind == colStream {
		return d.fastStreamLines(p)
	}
	cols := d.layout.cols[:d.layout.need]
	sc := &d.shapes
	done := 0
	for {
		dst := d.batch[:]
		if d.runs != nil {
			dst = d.run[len(d.run):fastRun] // the run is handed on when full
		}
		ready := sc.ready(p[done:])
		if ready {
			// Lines of a shape held, as many as dst takes.
			if k := sc.run(p[done:], dst); k > 0 {
				taken := d.took(d.streams.def, dst[:k])
				done += taken * sc.shapes[sc.last].n
				if taken < k {
					break
				}
				continue
			}
		}
		s, n, ok := fastLine(p[done:], cols)
		if !ok {
			sc.rest(ready)
			break
		}
		sc.learn(p[done:], n, cols, ready)
		dst[0] = s
		if d.took(d.streams.def, dst[:1]) == 0 {
			break
		}
		done += n
	}
	d.flushRun() // before any line of the general path
	return done
}

// shapedBatch is how many samples of shaped lines the fast lane reads
// before it hands them on one at a time.
const shapedBatch = 16

// took hands on the samples ss of stream st from the fast lane, which
// are d.run's next ones when it goes on in runs, and returns how many it
// took. Without a time column their time is made from the sample count;
// the fast lane's numbers are below 1e7 and no unit's factor takes them
// near overflow, so only a time made from a tiny declared rate can be
// infinite, and the fast lane stops before that sample, which the general
// path counts.
func (d *TextDecoder) took(st *streamState, ss []Sample) int {
	if !d.layout.hasTime {
		for i := range ss {
			if ss[i].TimeS = float64(st.n+int64(i)) / d.rateHz; math.IsInf(ss[i].TimeS, 0) {
				ss = ss[:i]
				break
			}
		}
	}
	st.n += int64(len(ss))
	d.stats.Samples += uint64(len(ss))
	if d.runs == nil {
		for _, s := range ss {
			d.emit(st.id, s)
		}
		return len(ss)
	}
	if d.runOf, d.run = st, d.run[:len(d.run)+len(ss)]; len(d.run) == fastRun {
		d.flushRun()
	}
	return len(ss)
}

// flushRun hands on the fast lane's run, if any.
func (d *TextDecoder) flushRun() {
	if len(d.run) > 0 {
		d.runs(d.runOf.id, d.run)
		d.run = d.run[:0]
	}
}

// fastLine reads one line of the fast lane at the start of b and returns
// its sample (its time as read), its length with the line end, and false
// when it is not such a line. Its numbers are those samples are written
// with, each after at most one blank: an optional sign, at most 7 digits,
// and optionally a '.' and at most 7 more, or up to 23 more in the
// shortest text of a computed value (longFraction). Each run of digits is
// read as one 64-bit word rather than a byte at a time (leadingDigits,
// digitsValue), so no branch guesses where a number ends; it reads only
// within b, and needs fastReach bytes from the start of each field (a long
// fraction checks for its own).
//
// The value: at most 14 digits make an integer below 2^53, exact as a
// float64, and dividing it by an exact power of ten up to 1e7 is one
// correctly rounded operation, hence the correctly rounded result (Clinger
// W.D., "How to read floating point numbers accurately", PLDI 1990), the
// same float64 as strconv.ParseFloat (FuzzFastLine checks it). A long
// fraction is exact the same way or by Eisel–Lemire (longFraction).
func fastLine(b []byte, cols []column) (Sample, int, bool) {
	vals := [8]float64{colVolume: NoVolume} // by column kind, in internal units
	i := 0
	for j, c := range cols {
		if len(b)-i < fastReach {
			return Sample{}, 0, false
		}
		if b[i] == ' ' { // one blank before a number, as in "0.005, 13.4, 50"
			if i++; len(b)-i < fastReach {
				return Sample{}, 0, false
			}
		}
		w := b[i : i+fastReach]
		neg := w[0] == '-'
		e := 0
		if neg || w[0] == '+' {
			e = 1
		}
		word := binary.LittleEndian.Uint64(w[e:])
		k1, k2 := leadingDigits(word), 0
		e += k1
		var frac uint64
		if w[e] == '.' {
			frac = binary.LittleEndian.Uint64(w[e+1:])
			k2 = leadingDigits(frac)
			e += 1 + k2
		}
		var v float64
		if k1 == 8 || k2 == 8 || k1+k2 == 0 {
			// A fraction that fills its word goes on in the next one (the
			// shortest text of a computed value); anything else is perhaps
			// more digits, or a sign or a point alone.
			var ok bool
			if k2 != 8 || k1 == 8 {
				return Sample{}, 0, false
			}
			if v, e, ok = longFraction(b[i:], e-8, word, frac, k1); !ok {
				return Sample{}, 0, false
			}
			w = b[i : i+e+2] // longFraction checked that the line end's bytes are there
		} else {
			var mant uint64
			if k1+k2 <= 8 {
				// Both runs fit one word: the fraction's digits right after
				// the integer's, read in one go.
				mant = digitsValue(word&(1<<(8*uint(k1))-1)|frac<<(8*uint(k1)), k1+k2)
			} else {
				// Longer numbers: the two runs' values, the integer part
				// scaled by the fraction's digits. Written here rather than
				// called, so that the loop keeps its values in registers
				// (10 fewer instructions a line).
				mant = digitsValue(word, k1)*pow10u[k2] + digitsValue(frac, k2)
			}
			v = float64(int64(mant)) / pow10[k2]
		}
		if neg {
			v = -v
		}
		switch end := w[e]; {
		case j < len(cols)-1 && end == ',':
			i += e + 1
		case j == len(cols)-1 && end == '\n':
			i += e + 1
		case j == len(cols)-1 && end == '\r' && w[e+1] == '\n':
			i += e + 2
		default:
			return Sample{}, 0, false
		}
		vals[c.kind&7] = c.unit.toInternal(v)
	}
	return Sample{TimeS: vals[colTime], PressureCmH2O: vals[colPressure], FlowLPS: vals[colFlow],
		VolumeL: vals[colVolume]}, i, true
}

// fastLayout reports whether lines of layout l may take the fast lane: its
// needed columns are all numbers, or a stream column and then numbers.
func fastLayout(l layout) bool {
	cols := l.cols[:l.need]
	if len(cols) > 1 && cols[0].kind == colStream {
		cols = cols[1:]
	}
	for _, c := range cols {
		if c.kind == colIgnore || c.kind == colStream {
			return false
		}
	}
	return len(cols) > 0
}

// fastStreamLines is fastLines for a layout whose first column is the
// stream: a line takes it when the stream table takes the bytes before its
// first comma as an id (so none is a blank) and the rest of the line is
// one of fastLine's. Such a line decodes here to what line
// would make of it; samples in runs go on in runs of one stream, a run
// ending where the stream changes.
func (d *TextDecoder) fastStreamLines(p []byte) int {
	cols := d.layout.cols[1:d.layout.need]
	done := 0
	for {
		b := p[done:]
		// The id ends at the first comma. The table takes only valid ids,
		// so an id with a blank, a line end or any other byte that is not
		// an id's goes to the general path, as does an empty one.
		k := bytes.IndexByte(b[:min(len(b), maxStreamID+1)], ',')
		if k <= 0 {
			break
		}
		st := d.streams.get(b[:k])
		if st == nil {
			break
		}
		s, n, ok := d.streamLine(b[k+1:], cols, st)
		if !ok {
			break
		}
		dst := d.batch[:1]
		if d.runs != nil {
			if st != d.runOf {
				d.flushRun() // a run is of one stream
			}
			dst = d.run[len(d.run) : len(d.run)+1]
		}
		dst[0] = s
		if d.took(st, dst) == 0 {
			break
		}
		done += k + 1 + n
	}
	d.flushRun() // before any line of the general path
	return done
}

// streamLine reads the rest of a line after its stream id, b, as fastLine
// does: by a shape held when it has one, else by fastLine, which teaches
// its shape. Lines of many streams each read one line at a time.
func (d *TextDecoder) streamLine(b []byte, cols []column, st *streamState) (Sample, int, bool) {
	sc := &d.shapes
	ready := sc.ready(b)
	if ready {
		// Streams interleave, each keeping its own shape for a while:
		// the shape of the stream's last line is tried first.
		if h := int(st.shape); h < sc.n {
			sc.last = h
		}
		if sc.run(b, d.batch[:1]) == 1 {
			st.shape = uint8(sc.last)
			return d.batch[0], sc.shapes[sc.last].n, true
		}
	}
	s, n, ok := fastLine(b, cols)
	if !ok {
		sc.rest(ready)
		return s, n, false
	}
	sc.learn(b, n, cols, ready)
	st.shape = uint8(sc.last)
	return s, n, true
}

// numberField reads the number at the start of b and finds the end of its
// field in one pass. It returns the value, what follows the field's comma
// (nil when no field follows), whether the field was blank, and false when
// the field is neither a number nor blank.
func numberField(b []byte) (v float64, rest []byte, empty, ok bool) {
	b = trimLeft(b)
	n := 0
	if len(b) > 0 && b[0] != ',' {
		if v, n, ok = scanNumber(b); !ok {
			return 0, nil, false, false
		}
	}
	if b = trimLeft(b[n:]); len(b) > 0 {
		if b[0] != ',' {
			return 0, nil, false, false
		}
		rest = b[1:]
	}
	return v, rest, n == 0, true
}

// trimLeft drops the blanks at the start of f.
func trimLeft(f []byte) []byte {
	for len(f) > 0 && (f[0] == ' ' || f[0] == '\t') {
		f = f[1:]
	}
	return f
}

func trimSpace(f []byte) []byte {
	for len(f) > 0 && (f[0] == ' ' || f[0] == '\t') {
		f = f[1:]
	}
	for len(f) > 0 && (f[len(f)-1] == ' ' || f[len(f)-1] == '\t') {
		f = f[:len(f)-1]
	}
	return f
}
