package ingest

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
)

// MaxLineBytes is the longest text line accepted, without its line ending;
// a longer line is counted as bad and skipped.
const MaxLineBytes = 1024

// column is one column of a text layout.
type column struct {
	kind colKind
	unit unit
}

// layout is the column layout of text input.
type layout struct {
	cols    []column
	need    int // number of fields a data line must have
	hasTime bool
	hasVol  bool
}

// parseLayout parses a header line or a columns spec such as
// "stream,time[ms],pressure[hPa],flow[L/s],volume[mL]". Column names are
// time, pressure, flow, volume and stream; others are ignored. The spec is
// a header candidate only when every field has the shape name or
// name[unit]; header reports whether it had that shape.
func parseLayout(b []byte, rateHz float64) (l layout, header bool, err error) {
	seen := map[colKind]bool{}
	for f := range bytes.SplitSeq(b, []byte{','}) {
		f = bytes.Trim(f, " \t")
		name, unitName, ok := splitColumn(f)
		if !ok {
			return layout{}, false, fmt.Errorf("column %q: want name or name[unit]", f)
		}
		k := kindOf(name)
		c := column{kind: k}
		if k != colIgnore {
			if seen[k] {
				return layout{}, true, fmt.Errorf("column %s given twice", k)
			}
			seen[k] = true
			if k != colStream {
				u, err := lookupUnit(k, unitName)
				if err != nil {
					return layout{}, true, err
				}
				c.unit = u
			}
			l.need = len(l.cols) + 1
		}
		l.cols = append(l.cols, c)
	}
	if !seen[colPressure] || !seen[colFlow] {
		return layout{}, false, errors.New("columns must include pressure and flow")
	}
	l.hasTime, l.hasVol = seen[colTime], seen[colVolume]
	if !l.hasTime && !(rateHz > 0) {
		return layout{}, true, errors.New("no time column and no declared sample rate")
	}
	return l, true, nil
}

// splitColumn splits "name[unit]" or "name"; the name starts with a letter
// and holds letters, digits, '_' or spaces.
func splitColumn(f []byte) (name, unit string, ok bool) {
	n := f
	if i := bytes.IndexByte(f, '['); i >= 0 {
		if f[len(f)-1] != ']' || i == len(f)-2 {
			return "", "", false
		}
		n = bytes.TrimRight(f[:i], " ")
		unit = string(f[i+1 : len(f)-1])
		if strings.ContainsAny(unit, "[],") {
			return "", "", false
		}
	}
	if len(n) == 0 || !(n[0] >= 'a' && n[0] <= 'z' || n[0] >= 'A' && n[0] <= 'Z') {
		return "", "", false
	}
	for _, c := range n {
		if !(c >= 'a' && c <= 'z' || c >= 'A' && c <= 'Z' || c >= '0' && c <= '9' || c == '_' || c == ' ') {
			return "", "", false
		}
	}
	return string(n), unit, true
}

// TextDecoder decodes the sample line format v1 (docs/framing.md): comma
// separated values, one sample per line, '\n' or "\r\n", '#' comments, an
// optional header line with units that may appear again at any point (a
// device that restarts sends it anew), and a configured layout for input
// without a header.
type TextDecoder struct {
	emit     EmitFunc
	runs     RunFunc      // DecoderOptions.Runs
	run      []Sample     // the fast lane's run for runs
	runOf    *streamState // the stream of run
	rateHz   float64
	layout   layout
	fast     bool // the layout's lines may take the fast lane (fastLines)
	err      error
	streams  streamTable
	carry    []byte
	skipping bool // discarding the rest of an over-long line
	stats    DecoderStats
	shapes   shapeCache // the fast lane's recent line shapes (text_shape.go)
	// batch holds the fast lane's samples of shaped lines on their way
	// when they go on one at a time (not in runs).
	batch [shapedBatch]Sample
}

var _ Decoder = (*TextDecoder)(nil)

// NewTextDecoder returns a text decoder; it fails when opts.Columns is not a
// valid layout.
func NewTextDecoder(opts DecoderOptions, emit EmitFunc) (*TextDecoder, error) {
	cols := opts.Columns
	if cols == "" {
		cols = DefaultColumns
	}
	if math.IsNaN(opts.RateHz) || math.IsInf(opts.RateHz, 0) || opts.RateHz < 0 {
		return nil, fmt.Errorf("sample rate %v Hz: want a positive number", opts.RateHz)
	}
	l, _, err := parseLayout([]byte(cols), opts.RateHz)
	if err != nil {
		return nil, fmt.Errorf("columns %q: %w", cols, err)
	}
	stream := opts.Stream
	if stream == "" {
		stream = DefaultStream
	}
	if !ValidStreamID(stream) {
		return nil, fmt.Errorf("stream id %q: want 1 to %d letters, digits, '-' or '_'", stream, maxStreamID)
	}
	if emit == nil {
		emit = func(string, Sample) {}
	}
	d := &TextDecoder{
		emit:    emit,
		runs:    opts.Runs,
		rateHz:  opts.RateHz,
		layout:  l,
		fast:    fastLayout(l),
		streams: newStreamTable(stream),
		carry:   make([]byte, 0, MaxLineBytes+1),
	}
	if d.runs != nil {
		d.run = make([]Sample, 0, fastRun)
	}
	return d, nil
}

// fastRun is the longest run the fast lane hands to DecoderOptions.Runs.
const fastRun = 256

// Stats returns the decoder's counters.
func (d *TextDecoder) Stats() DecoderStats { return d.stats }

// Err returns the problem of the last header line, or nil.
func (d *TextDecoder) Err() error { return d.err }

// Write decodes the complete lines in p and keeps a trailing partial line
// for the next call. It always returns len(p), nil.
func (d *TextDecoder) Write(p []byte) (int, error) {
	n := len(p)
	for len(p) > 0 {
		if d.fast && d.err == nil && !d.skipping && len(d.carry) == 0 {
			if p = p[d.fastLines(p):]; len(p) == 0 {
				break
			}
		}
		i := bytes.IndexByte(p, '\n')
		if d.skipping {
			if i < 0 {
				return n, nil
			}
			d.skipping = false
			p = p[i+1:]
			continue
		}
		if i < 0 {
			if len(d.carry)+len(p) > MaxLineBytes+1 { // +1: a '\r' may follow
				d.stats.BadLines++
				d.carry = d.carry[:0]
				d.skipping = true
			} else {
				d.carry = append(d.carry, p...)
			}
			return n, nil
		}
		if len(d.carry) == 0 {
			d.line(p[:i])
		} else if len(d.carry)+i > MaxLineBytes+1 {
			d.stats.BadLines++
			d.carry = d.carry[:0]
		} else {
			d.carry = append(d.carry, p[:i]...)
			d.line(d.carry)
			d.carry = d.carry[:0]
		}
		p = p[i+1:]
	}
	return n, nil
}

// Flush decodes a last line that has no line ending.
func (d *TextDecoder) Flush() {
	if len(d.carry) > 0 {
		d.line(d.carry)
		d.carry = d.carry[:0]
	}
	d.skipping = false
}

// Reset drops a partial line, counting it as bad.
func (d *TextDecoder) Reset() {
	if len(d.carry) > 0 || d.skipping {
		if len(d.carry) > 0 {
			d.stats.BadLines++
		}
		d.carry = d.carry[:0]
	}
	d.skipping = false
}

// line decodes one line without its '\n'.
func (d *TextDecoder) line(b []byte) {
	if len(b) > 0 && b[len(b)-1] == '\r' {
		b = b[:len(b)-1]
	}
	if len(b) > MaxLineBytes {
		d.stats.BadLines++
		return
	}
	for len(b) > 0 && (b[0] == ' ' || b[0] == '\t') {
		b = b[1:]
	}
	if len(b) == 0 || b[0] == '#' {
		return
	}
	if d.err == nil && d.data(b) {
		return
	}
	// Not a data line: it may be a header that sets the layout.
	l, header, err := parseLayout(b, d.rateHz)
	if header {
		if err != nil {
			d.err = fmt.Errorf("header %q: %w", b, err)
			d.stats.BadLines++
			return
		}
		d.layout, d.fast, d.err = l, fastLayout(l), nil
		d.shapes = shapeCache{} // shapes hold the columns' places
		return
	}
	d.stats.BadLines++
}

// data decodes a data line and reports whether it was one.
func (d *TextDecoder) data(b []byte) bool {
	s := Sample{VolumeL: NoVolume}
	st := d.streams.def
	var t float64
	cols := d.layout.cols
	more := true // another field follows
	for j := 0; j < d.layout.need; {
		if !more {
			return false // too few fields
		}
		c := cols[j]
		j++
		if c.kind == colIgnore || c.kind == colStream {
			// Fields are a few bytes long: a plain loop finds the comma
			// sooner than a call to bytes.IndexByte.
			k := 0
			for k < len(b) && b[k] != ',' {
				k++
			}
			f := b[:k]
			if k < len(b) {
				b = b[k+1:]
			} else {
				b, more = nil, false
			}
			if c.kind == colStream {
				if st = d.streams.get(trimSpace(f)); st == nil {
					return false
				}
			}
			continue
		}
		v, rest, empty, ok := numberField(b)
		if !ok {
			return false
		}
		b, more = rest, rest != nil
		if empty {
			if c.kind == colVolume {
				continue // volume not known for this sample: stays NaN
			}
			return false
		}
		v = c.unit.toInternal(v)
		switch c.kind {
		case colTime:
			t = v
		case colPressure:
			s.PressureCmH2O = v
		case colFlow:
			s.FlowLPS = v
		case colVolume:
			s.VolumeL = v
		}
	}
	if d.layout.hasTime {
		s.TimeS = t
	} else {
		s.TimeS = float64(st.n) / d.rateHz
	}
	if math.IsInf(s.TimeS, 0) || math.IsInf(s.PressureCmH2O, 0) || math.IsInf(s.FlowLPS, 0) || math.IsInf(s.VolumeL, 0) {
		return false // finite input overflowed by a unit conversion
	}
	st.n++
	d.stats.Samples++
	d.emit(st.id, s)
	return true
}

// TextEncoderOptions choose the columns and units that a TextEncoder writes.
type TextEncoderOptions struct {
	// Units of the columns; empty means s, cmH2O, L/min and mL.
	TimeUnit, PressureUnit, FlowUnit, VolumeUnit string
	// NoTime leaves out the time column (the reader then needs the rate).
	NoTime bool
	// Volume adds a volume column.
	Volume bool
	// Stream adds a stream column first.
	Stream bool
	// Decimals is the number of digits after the decimal point; 0 writes the
	// shortest text that reads back to the identical float64.
	Decimals int
	// CRLF ends lines with "\r\n" instead of "\n".
	CRLF bool
	// NoHeader makes Header return nothing (for headerless input).
	NoHeader bool
}

// TextEncoder writes the sample line format v1.
type TextEncoder struct {
	opts                 TextEncoderOptions
	header               []byte
	time, press, fl, vol unit
}

var _ Encoder = (*TextEncoder)(nil)

// NewTextEncoder returns a text encoder; it fails on an unknown unit.
func NewTextEncoder(opts TextEncoderOptions) (*TextEncoder, error) {
	e := &TextEncoder{opts: opts}
	var cols []string
	add := func(k colKind, name string, u *unit) error {
		if name == "" {
			name = units[k].def
		}
		c, err := lookupUnit(k, name)
		if err != nil {
			return err
		}
		*u = c
		cols = append(cols, k.String()+"["+name+"]")
		return nil
	}
	if opts.Stream {
		cols = append(cols, "stream")
	}
	if !opts.NoTime {
		if err := add(colTime, opts.TimeUnit, &e.time); err != nil {
			return nil, err
		}
	}
	if err := add(colPressure, opts.PressureUnit, &e.press); err != nil {
		return nil, err
	}
	if err := add(colFlow, opts.FlowUnit, &e.fl); err != nil {
		return nil, err
	}
	if opts.Volume {
		if err := add(colVolume, opts.VolumeUnit, &e.vol); err != nil {
			return nil, err
		}
	}
	if opts.Decimals < 0 || opts.Decimals > 17 {
		return nil, fmt.Errorf("decimals %d: want 0 to 17", opts.Decimals)
	}
	if !opts.NoHeader {
		e.header = e.eol([]byte(strings.Join(cols, ",")))
	}
	return e, nil
}

// Columns returns the layout the encoder writes, as a columns spec for a
// decoder of headerless input.
func (e *TextEncoder) Columns() string {
	h := e.header
	if e.opts.NoHeader {
		c := *e
		c.opts.NoHeader = false
		n, _ := NewTextEncoder(c.opts)
		h = n.header
	}
	return strings.TrimRight(string(h), "\r\n")
}

func (e *TextEncoder) eol(b []byte) []byte {
	if e.opts.CRLF {
		return append(b, '\r', '\n')
	}
	return append(b, '\n')
}

// WithStream returns an encoder like e that writes the stream column first
// (in the header and in every line), or e itself when it already does. A
// writer whose samples carry a stream id of their own uses it so that the id
// reaches the reader: without the column, every sample of a text link falls
// into the reader's default stream, and two writers on one source merge.
func (e *TextEncoder) WithStream() *TextEncoder {
	if e.opts.Stream {
		return e
	}
	o := e.opts
	o.Stream = true
	n, err := NewTextEncoder(o)
	if err != nil {
		return e // e's options were accepted once; they are accepted again
	}
	return n
}

// HasStream reports whether the encoder writes the stream column.
func (e *TextEncoder) HasStream() bool { return e.opts.Stream }

// Header returns the header line, or nothing with NoHeader. Appending to
// it never writes into the encoder.
func (e *TextEncoder) Header() []byte { return e.header[:len(e.header):len(e.header)] }

func (e *TextEncoder) num(dst []byte, v float64) []byte {
	if e.opts.Decimals == 0 {
		return strconv.AppendFloat(dst, v, 'g', -1, 64)
	}
	return strconv.AppendFloat(dst, v, 'f', e.opts.Decimals, 64)
}

// Append appends one line. A NaN volume is written as an empty field, which
// reads back as NaN.
func (e *TextEncoder) Append(dst []byte, stream string, s Sample) []byte {
	if e.opts.Stream {
		dst = append(dst, stream...)
		dst = append(dst, ',')
	}
	if !e.opts.NoTime {
		dst = e.num(dst, e.time.fromInternal(s.TimeS))
		dst = append(dst, ',')
	}
	dst = e.num(dst, e.press.fromInternal(s.PressureCmH2O))
	dst = append(dst, ',')
	dst = e.num(dst, e.fl.fromInternal(s.FlowLPS))
	if e.opts.Volume {
		dst = append(dst, ',')
		if !math.IsNaN(s.VolumeL) {
			dst = e.num(dst, e.vol.fromInternal(s.VolumeL))
		}
	}
	return e.eol(dst)
}
