package ingest

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"hash/crc32"
	"math"
)

// The binary framing, version 1 (docs/framing.md has it byte by byte). All
// integers are little-endian.
//
//	offset size field
//	0      2    sync 0xA5 0x7E
//	2      1    version (1)
//	3      1    flags: bit 0 device time present, bit 1 volume present, others 0
//	4      1    S, stream id length (0..32; 0 = the reader's default stream)
//	5      1    N, samples in the frame (1..255)
//	6      4    sequence counter of the first sample (uint32, wraps)
//	10     4    declared sample rate in mHz (uint32; 0 = not declared)
//	14     1    pressure exponent (int8): cmH2O = raw × 10^e
//	15     1    flow exponent (int8): L/s = raw × 10^e
//	16     1    volume exponent (int8): L = raw × 10^e
//	17     1    time exponent (int8): s = raw × 10^e
//	18     S    stream id (ASCII letters, digits, '-', '_')
//	       8    t0, device time of the first sample (int64), if flag bit 0
//	       N×K  samples: pressure int32, flow int32, volume int32 if flag bit 1
//	       4    CRC-32C (Castagnoli) of every byte from offset 2 to here
const (
	frameSync0     = 0xA5
	frameSync1     = 0x7E
	frameVersion   = 1
	frameHeaderLen = 18
	frameCRCLen    = 4
	flagTime       = 1 << 0
	flagVolume     = 1 << 1
	flagsKnown     = flagTime | flagVolume
	// MaxFrameSamples is the largest sample count of one frame.
	MaxFrameSamples = 255
	// MaxFrameBytes is the length of the largest valid frame.
	MaxFrameBytes = frameHeaderLen + maxStreamID + 8 + MaxFrameSamples*12 + frameCRCLen
	// minExp and maxExp bound the scale exponents of a valid frame.
	minExp = -12
	maxExp = 6
	// rawAbsent in the volume field marks a sample without volume.
	rawAbsent = math.MinInt32
)

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

// Scale gives the fixed-point resolution of the binary framing as powers of
// ten of the internal units: a value is stored as round(v / 10^exp) in an
// int32.
type Scale struct {
	PressureExp int8 // cmH2O
	FlowExp     int8 // L/s
	VolumeExp   int8 // L
	TimeExp     int8 // s
}

// DefaultScale stores pressure in µcmH2O·1000 (0.001 cmH2O, range ±2.1e6),
// flow in 0.01 mL/s (range ±21 000 L/s), volume in µL and device time in µs.
var DefaultScale = Scale{PressureExp: -3, FlowExp: -5, VolumeExp: -6, TimeExp: -6}

func validExp(e int8) bool { return e >= minExp && e <= maxExp }

// scaleFactor returns 10^|e| and whether to divide (e < 0): dividing the
// integer by an exact power of ten gives the correctly rounded decimal value.
func scaleFactor(e int8) (float64, bool) {
	if e < 0 {
		return pow10[-e], true
	}
	return pow10[e], false
}

func fromRaw(raw int32, f float64, div bool) float64 {
	if div {
		return float64(raw) / f
	}
	return float64(raw) * f
}

func fromRaw64(raw int64, f float64, div bool) float64 {
	if div {
		return float64(raw) / f
	}
	return float64(raw) * f
}

func toRaw(v float64, e int8) int32 {
	f, div := scaleFactor(e)
	if div {
		v *= f
	} else {
		v /= f
	}
	v = math.Round(v)
	switch {
	case math.IsNaN(v):
		return 0
	case v >= math.MaxInt32:
		return math.MaxInt32
	case v <= math.MinInt32+1:
		return math.MinInt32 + 1
	}
	return int32(v)
}

// BinaryEncoderOptions configure a BinaryEncoder.
type BinaryEncoderOptions struct {
	// RateHz is the declared sample rate written in every frame. Without
	// Time it is required: the reader times samples by counter and rate.
	RateHz float64
	// Time writes the samples' TimeS as the device time of each frame.
	Time bool
	// Volume writes the samples' VolumeL.
	Volume bool
	// Scale is the fixed-point resolution; nil means DefaultScale.
	Scale *Scale
}

// BinaryEncoder writes the binary framing. It numbers the samples of each
// stream from 0 with the frame's sequence counter.
type BinaryEncoder struct {
	opts    BinaryEncoderOptions
	scale   Scale
	rateMHz uint32
	seq     map[string]uint32
}

var _ Encoder = (*BinaryEncoder)(nil)

// NewBinaryEncoder returns a binary encoder.
func NewBinaryEncoder(opts BinaryEncoderOptions) (*BinaryEncoder, error) {
	e := &BinaryEncoder{opts: opts, scale: DefaultScale, seq: map[string]uint32{}}
	if opts.Scale != nil {
		e.scale = *opts.Scale
	}
	for _, x := range []int8{e.scale.PressureExp, e.scale.FlowExp, e.scale.VolumeExp, e.scale.TimeExp} {
		if !validExp(x) {
			return nil, fmt.Errorf("scale exponent %d: want %d to %d", x, minExp, maxExp)
		}
	}
	r := math.Round(opts.RateHz * 1000)
	if math.IsNaN(r) || r < 0 || r > math.MaxUint32 {
		return nil, fmt.Errorf("sample rate %v Hz: want 0 to 4.29 MHz", opts.RateHz)
	}
	e.rateMHz = uint32(r)
	if !opts.Time && e.rateMHz == 0 {
		return nil, fmt.Errorf("binary encoder without device time needs a sample rate")
	}
	return e, nil
}

// Header returns nothing: every frame stands alone.
func (e *BinaryEncoder) Header() []byte { return nil }

// Append appends one frame holding one sample.
func (e *BinaryEncoder) Append(dst []byte, stream string, s Sample) []byte {
	return e.AppendFrame(dst, stream, []Sample{s})
}

// AppendFrame appends frames holding the samples in order, up to
// MaxFrameSamples per frame. With device time, the samples of one frame are
// taken to be 1/RateHz apart (only the first one's TimeS is written); a
// stream id that is not valid is written as the empty (default) id.
func (e *BinaryEncoder) AppendFrame(dst []byte, stream string, samples []Sample) []byte {
	if !ValidStreamID(stream) {
		stream = ""
	}
	for len(samples) > 0 {
		n := min(len(samples), MaxFrameSamples)
		if e.opts.Time && e.rateMHz == 0 {
			n = 1
		}
		dst = e.frame(dst, stream, samples[:n])
		samples = samples[n:]
	}
	return dst
}

func (e *BinaryEncoder) frame(dst []byte, stream string, samples []Sample) []byte {
	start := len(dst)
	var flags byte
	if e.opts.Time {
		flags |= flagTime
	}
	if e.opts.Volume {
		flags |= flagVolume
	}
	seq := e.seq[stream]
	e.seq[stream] = seq + uint32(len(samples))
	dst = append(dst, frameSync0, frameSync1, frameVersion, flags, byte(len(stream)), byte(len(samples)))
	dst = binary.LittleEndian.AppendUint32(dst, seq)
	dst = binary.LittleEndian.AppendUint32(dst, e.rateMHz)
	dst = append(dst, byte(e.scale.PressureExp), byte(e.scale.FlowExp), byte(e.scale.VolumeExp), byte(e.scale.TimeExp))
	dst = append(dst, stream...)
	if e.opts.Time {
		f, div := scaleFactor(e.scale.TimeExp)
		t := samples[0].TimeS
		if div {
			t *= f
		} else {
			t /= f
		}
		t = math.Round(t)
		if math.IsNaN(t) {
			t = 0
		}
		t = max(min(t, math.MaxInt64/2), math.MinInt64/2)
		dst = binary.LittleEndian.AppendUint64(dst, uint64(int64(t)))
	}
	for _, s := range samples {
		dst = binary.LittleEndian.AppendUint32(dst, uint32(toRaw(s.PressureCmH2O, e.scale.PressureExp)))
		dst = binary.LittleEndian.AppendUint32(dst, uint32(toRaw(s.FlowLPS, e.scale.FlowExp)))
		if e.opts.Volume {
			v := int32(rawAbsent)
			if !math.IsNaN(s.VolumeL) {
				v = toRaw(s.VolumeL, e.scale.VolumeExp)
			}
			dst = binary.LittleEndian.AppendUint32(dst, uint32(v))
		}
	}
	return binary.LittleEndian.AppendUint32(dst, crc32.Checksum(dst[start+2:], castagnoli))
}

// BinaryDecoder decodes the binary framing. It searches the sync bytes,
// checks the header and the CRC, and on any failure moves one byte past the
// failed sync and searches again, so that a valid frame is never lost behind
// corrupt bytes. Every byte that is not part of a valid frame is counted in
// SkippedBytes; each stretch of such bytes counts once in BadFrames.
type BinaryDecoder struct {
	emit    EmitFunc
	rateHz  float64
	streams streamTable
	carry   []byte
	inBad   bool // inside a stretch of bytes that are not a valid frame
	stats   DecoderStats
	err     error
	lastID  []byte
	lastSt  *streamState
	prof    frameProfile
}

// frameProfile caches the conversions of the last frame's rate and scales.
type frameProfile struct {
	ok                     bool
	key                    [8]byte // bytes 10..17 of the frame
	rateHz                 float64
	pf, ff, vf, tf         float64
	pdiv, fdiv, vdiv, tdiv bool
}

var _ Decoder = (*BinaryDecoder)(nil)

// NewBinaryDecoder returns a binary decoder. opts.RateHz times frames that
// carry neither device time nor a rate; opts.Columns is not used.
func NewBinaryDecoder(opts DecoderOptions, emit EmitFunc) (*BinaryDecoder, error) {
	if math.IsNaN(opts.RateHz) || math.IsInf(opts.RateHz, 0) || opts.RateHz < 0 {
		return nil, fmt.Errorf("sample rate %v Hz: want a positive number", opts.RateHz)
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
	return &BinaryDecoder{
		emit:    emit,
		rateHz:  opts.RateHz,
		streams: newStreamTable(stream),
		carry:   make([]byte, 0, 2*MaxFrameBytes),
	}, nil
}

// Stats returns the decoder's counters.
func (d *BinaryDecoder) Stats() DecoderStats { return d.stats }

// Err returns nil: frames describe themselves.
func (d *BinaryDecoder) Err() error { return d.err }

// Write decodes the complete frames in p and keeps a trailing partial frame
// for the next call. It always returns len(p), nil.
func (d *BinaryDecoder) Write(p []byte) (int, error) {
	n := len(p)
	// Complete the carried partial frame a piece at a time (the carry never
	// grows past two frames), then go on in p itself without copying it.
	for len(p) > 0 && len(d.carry) > 0 {
		k := min(len(p), MaxFrameBytes)
		d.carry = append(d.carry, p[:k]...)
		p = p[k:]
		used := d.scan(d.carry, false)
		d.carry = d.carry[:copy(d.carry, d.carry[used:])]
	}
	if len(p) > 0 {
		used := d.scan(p, false)
		d.carry = append(d.carry, p[used:]...)
	}
	return n, nil
}

// Flush discards a partial frame at the end of the input, counting it as
// skipped, after decoding any frame that starts inside it.
func (d *BinaryDecoder) Flush() {
	if len(d.carry) > 0 {
		d.scan(d.carry, true)
		d.carry = d.carry[:0]
	}
	d.inBad = false
}

// Reset drops a partial frame, counting its bytes as skipped.
func (d *BinaryDecoder) Reset() {
	d.skip(len(d.carry))
	d.carry = d.carry[:0]
	d.inBad = false
}

// skip counts n bytes that are not part of a valid frame.
func (d *BinaryDecoder) skip(n int) {
	if n <= 0 {
		return
	}
	d.stats.SkippedBytes += uint64(n)
	if !d.inBad {
		d.inBad = true
		d.stats.BadFrames++
	}
}

// scan decodes the frames in b and returns how many bytes it consumed; the
// rest is a partial frame. At the end of the input (final) nothing is kept.
func (d *BinaryDecoder) scan(b []byte, final bool) int {
	i := 0
	for i < len(b) {
		if b[i] != frameSync0 { // in sync, the next frame starts right here
			j := bytes.IndexByte(b[i:], frameSync0)
			if j < 0 {
				d.skip(len(b) - i)
				return len(b)
			}
			d.skip(j)
			i += j
		}
		if len(b)-i < frameHeaderLen {
			if final || (len(b)-i >= 2 && b[i+1] != frameSync1) {
				d.skip(1)
				i++
				continue
			}
			return i
		}
		size, ok := frameSize(b[i:])
		if !ok {
			d.skip(1)
			i++
			continue
		}
		if len(b)-i < size {
			if final {
				d.skip(1)
				i++
				continue
			}
			return i
		}
		if !d.frame(b[i : i+size]) {
			d.skip(1)
			i++
			continue
		}
		d.inBad = false
		i += size
	}
	return i
}

// frameSize checks a frame header and returns the length of the frame.
func frameSize(h []byte) (int, bool) {
	if h[1] != frameSync1 || h[2] != frameVersion || h[3]&^flagsKnown != 0 {
		return 0, false
	}
	s, n := int(h[4]), int(h[5])
	if s > maxStreamID || n == 0 {
		return 0, false
	}
	if !validExp(int8(h[14])) || !validExp(int8(h[15])) || !validExp(int8(h[16])) || !validExp(int8(h[17])) {
		return 0, false
	}
	k := 8
	if h[3]&flagVolume != 0 {
		k = 12
	}
	size := frameHeaderLen + s + n*k + frameCRCLen
	if h[3]&flagTime != 0 {
		size += 8
	}
	return size, true
}

// frame checks the CRC of a complete frame and emits its samples; it reports
// false for a frame that is not valid.
func (d *BinaryDecoder) frame(f []byte) bool {
	body := f[:len(f)-frameCRCLen]
	if crc32.Checksum(body[2:], castagnoli) != binary.LittleEndian.Uint32(f[len(body):]) {
		return false
	}
	flags := f[3]
	slen, n := int(f[4]), int(f[5])
	seq := binary.LittleEndian.Uint32(f[6:])
	// Frames of one link repeat their rate and scales: convert them once.
	if !d.prof.ok || [8]byte(f[10:18]) != d.prof.key {
		d.prof.key = [8]byte(f[10:18])
		d.prof.rateHz = float64(binary.LittleEndian.Uint32(f[10:])) / 1000
		if d.prof.rateHz == 0 {
			d.prof.rateHz = d.rateHz
		}
		d.prof.pf, d.prof.pdiv = scaleFactor(int8(f[14]))
		d.prof.ff, d.prof.fdiv = scaleFactor(int8(f[15]))
		d.prof.vf, d.prof.vdiv = scaleFactor(int8(f[16]))
		d.prof.tf, d.prof.tdiv = scaleFactor(int8(f[17]))
		d.prof.ok = true
	}
	pr := &d.prof
	rateHz := pr.rateHz
	id := f[frameHeaderLen : frameHeaderLen+slen]
	p := frameHeaderLen + slen
	var t0 float64
	hasTime := flags&flagTime != 0
	if hasTime {
		t0 = fromRaw64(int64(binary.LittleEndian.Uint64(f[p:])), pr.tf, pr.tdiv)
		p += 8
		if n > 1 && rateHz == 0 {
			return false
		}
	} else if rateHz == 0 {
		return false // no way to time the samples
	}
	st := d.stream(id)
	if st == nil {
		return false
	}
	// Unwrap the 32-bit counter into the stream's 64-bit sample index.
	if st.started {
		st.n += int64(int32(seq - uint32(st.n)))
	} else {
		st.n, st.started = int64(seq), true
	}
	vol := flags&flagVolume != 0
	for k := 0; k < n; k++ {
		s := Sample{
			PressureCmH2O: fromRaw(int32(binary.LittleEndian.Uint32(f[p:])), pr.pf, pr.pdiv),
			FlowLPS:       fromRaw(int32(binary.LittleEndian.Uint32(f[p+4:])), pr.ff, pr.fdiv),
			VolumeL:       NoVolume,
		}
		p += 8
		if vol {
			if raw := int32(binary.LittleEndian.Uint32(f[p:])); raw != rawAbsent {
				s.VolumeL = fromRaw(raw, pr.vf, pr.vdiv)
			}
			p += 4
		}
		if hasTime {
			s.TimeS = t0
			if k > 0 {
				s.TimeS += float64(k) / rateHz
			}
		} else {
			s.TimeS = float64(st.n+int64(k)) / rateHz
		}
		d.stats.Samples++
		d.emit(st.id, s)
	}
	st.n += int64(n)
	return true
}

func (d *BinaryDecoder) stream(id []byte) *streamState {
	if d.lastSt != nil && bytes.Equal(id, d.lastID) {
		return d.lastSt
	}
	if len(id) > 0 && !validStreamID(id) {
		return nil
	}
	st := d.streams.get(id)
	if st != nil {
		d.lastID = append(d.lastID[:0], id...)
		d.lastSt = st
	}
	return st
}
