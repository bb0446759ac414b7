package ingest

import (
	"encoding/binary"
	"math"
)

// Line shapes: the fast lane's shortcut for lines laid out like a recent
// one.
//
// A sender writes its numbers with a fixed count of decimals, so most
// lines have the same bytes in the same places as one of the last few:
// the same digits' positions, the same signs, points, commas and line end
// ("0.0050,13.4167,50.0000\n" and "0.0100,13.5000,50.0000\n"). The shape
// changes when a value gains a digit or changes sign, a few times a
// breath: over 10 min of simulated patients at 25 and 200 Hz, 4 shapes
// held all but 0.01–0.08 % of the lines. A line of a known shape is read
// without looking for where its numbers end: its four 8-byte words are
// checked against the shape, and each number is valued from the places
// the shape gives, in runs of lines. Every other line takes fastLine, and
// teaches its shape when it has one.

// maxShapeBytes is the longest line, with its end, that a shape describes:
// four words.
const maxShapeBytes = 32

// shapeReach is how many bytes a shaped line reads from its start: the
// four words, and the 8-byte word of a number starting in the last one.
const shapeReach = maxShapeBytes + 8

// maxShapeFields is the most numbers a shaped line holds.
const maxShapeFields = 4

// shapeSlots is how many shapes a decoder keeps.
const shapeSlots = 4

// lineShape is the layout of the bytes of one kind of line and where the
// digits of each of its numbers are. A line has the shape when, in each of
// its words, the bytes under mask are those of want (the separators, signs
// and points exactly, the high half of every digit 0x3) and no digit's low
// half is above 9 (digitLow marks the digits).
type lineShape struct {
	n                    int // the line's length with its end
	mask, want, digitLow [maxShapeBytes / 8]uint64
	fields               [maxShapeFields]shapeField
	nf                   int
}

// shapeField is one number of a shaped line, with all that valuing it
// needs worked out: its integer digits from byte at, its fraction's from
// byte frac (k1 and k2 of them, k1 + k2 ≤ 8, each at most 7, as fastLine
// requires), the shifts that put them side by side at the top of a word,
// the power of ten that scales it, its sign bit, and its column.
type shapeField struct {
	at, frac  int
	intMask   uint64 // the integer's k1 bytes
	fracShift uint   // 8·k1
	topShift  uint   // 8·(8 − k1 − k2)
	scale     float64
	sign      uint64 // the float64 sign bit when the number is negative
	col       column
}

// shapedRun reads the lines of shape s at the start of b into dst, as
// many as dst holds while b holds shapeReach bytes from the line's start,
// and returns how many it read; each is s.n bytes long. Each sample is
// what fastLine makes of its line: the same digits valued by the same
// operations.
func shapedRun(b []byte, s *lineShape, dst []Sample) int {
	k, off := 0, 0
	for ; k < len(dst) && len(b)-off >= shapeReach; k++ {
		w := b[off : off+shapeReach]
		// Every word of the four is checked, those past the line's end
		// with empty masks: no loop, and no branch on the line's length.
		// A digit's low half plus 6 stays under 0x10 up to 9; no carry
		// leaves a byte (0x0F + 6 < 0x100).
		const low, six = 0x0F0F0F0F0F0F0F0F, 0x0606060606060606
		x0, x1 := binary.LittleEndian.Uint64(w[0:]), binary.LittleEndian.Uint64(w[8:])
		x2, x3 := binary.LittleEndian.Uint64(w[16:]), binary.LittleEndian.Uint64(w[24:])
		bad := (x0&s.mask[0] ^ s.want[0]) | (x0&low+six)&s.digitLow[0] |
			(x1&s.mask[1] ^ s.want[1]) | (x1&low+six)&s.digitLow[1] |
			(x2&s.mask[2] ^ s.want[2]) | (x2&low+six)&s.digitLow[2] |
			(x3&s.mask[3] ^ s.want[3]) | (x3&low+six)&s.digitLow[3]
		if bad != 0 {
			break
		}
		vals := [8]float64{colVolume: NoVolume} // by column kind, in internal units
		for j := range s.nf & 7 {
			f := &s.fields[j&(maxShapeFields-1)]
			word := binary.LittleEndian.Uint64(w[f.at&(maxShapeBytes-1):])
			frac := binary.LittleEndian.Uint64(w[f.frac&(maxShapeBytes-1):])
			// The fraction's digits right after the integer's, at the top
			// of the word, valued as digitsValue values them. (Shifts
			// masked to 63: the compiler then needs no code for larger
			// ones.)
			v := (word&f.intMask | frac<<(f.fracShift&63)) & 0x0F0F0F0F0F0F0F0F << (f.topShift & 63)
			v = (v * (10<<8 + 1)) >> 8
			v = ((v & 0x00FF00FF00FF00FF) * (100<<16 + 1)) >> 16
			v = ((v & 0x0000FFFF0000FFFF) * (10000<<32 + 1)) >> 32
			x := math.Float64frombits(math.Float64bits(float64(int64(v))/f.scale) ^ f.sign)
			vals[f.col.kind&7] = f.col.unit.toInternal(x)
		}
		dst[k] = Sample{TimeS: vals[colTime], PressureCmH2O: vals[colPressure], FlowLPS: vals[colFlow],
			VolumeL: vals[colVolume]}
		off += s.n
	}
	return k
}

// learnShape describes line, which fastLine read as numbers of the columns
// cols, and reports false when it cannot be a shape: too long, too many
// numbers, or a number of another form. The line's numbers are those of
// fastLine's form, so only their places need finding.
func learnShape(line []byte, cols []column) (lineShape, bool) {
	var s lineShape
	if len(line) > maxShapeBytes || len(cols) > maxShapeFields {
		return s, false
	}
	s.n, s.nf = len(line), len(cols)
	i := 0
	for j, c := range cols {
		f := &s.fields[j]
		f.col = c
		if line[i] == ' ' {
			i++ // the blank fastLine allows before a number
		}
		if line[i] == '-' || line[i] == '+' {
			if line[i] == '-' {
				f.sign = 1 << 63
			}
			i++
		}
		f.at = i
		for i < len(line) && isDigit(line[i]) {
			i++
		}
		k1 := i - f.at
		f.frac = i
		if i < len(line) && line[i] == '.' {
			i++
			f.frac = i
			for i < len(line) && isDigit(line[i]) {
				i++
			}
		}
		k2 := i - f.frac
		if k1 > 7 || k2 > 7 || k1+k2 > 8 || k1+k2 == 0 {
			return s, false
		}
		f.intMask, f.fracShift, f.topShift = 1<<(8*uint(k1))-1, 8*uint(k1), 8*uint(8-k1-k2)
		f.scale = pow10[k2]
		i++ // the comma or the line end ('\r' is checked as a byte below)
	}
	for k, c := range line {
		word, bit := k/8, uint(k%8)*8
		s.mask[word] |= 0xFF << bit
		if isDigit(c) {
			s.want[word] |= 0x30 << bit
			s.mask[word] &^= 0x0F << bit
			s.digitLow[word] |= 0x10 << bit
		} else {
			s.want[word] |= uint64(c) << bit
		}
	}
	return s, true
}

// isDigit reports whether c is an ASCII digit.
func isDigit(c byte) bool { return '0' <= c && c <= '9' }

// shapeCache holds a decoder's recent line shapes, the one that matched
// last tried first.
type shapeCache struct {
	shapes [shapeSlots]lineShape
	n      int // shapes held
	last   int // the one that matched or was learned last
	next   int // the slot the next shape learned takes
	// misses counts the lines that neither a shape nor fastLine read since
	// a shape was last learned, and fresh the shapes learned since a line
	// was last read by one.
	misses, fresh int
	// idle counts lines on which no shape is tried or learned: the shapes
	// rest after a line that fastLine read but that had no shape (numbers
	// too long, say), after shapeMissRun lines that only the general path
	// read, and after shapeMissRun shapes learned in a row that no line
	// then had (lines of many streams whose layouts differ). Input whose
	// lines seldom repeat a shape pays for the tries once in a while, not
	// on every line.
	idle int
}

// shapeMissRun is how many lines in a row may miss the shapes, as above,
// before they rest for shapeIdleLines lines.
const shapeMissRun = 8

// shapeIdleLines is how many lines the shapes rest.
const shapeIdleLines = 64

// ready reports whether the line at the start of b is one for the shapes:
// they are not resting, and b holds the bytes a shaped read needs.
func (c *shapeCache) ready(b []byte) bool {
	return c.idle == 0 && len(b) >= shapeReach
}

// run reads the lines at the start of b into dst (see shapedRun), with
// the shape that matched last or else the first other that reads any,
// which becomes the last; it returns how many it read. b holds
// shapeReach bytes.
func (c *shapeCache) run(b []byte, dst []Sample) int {
	if c.n == 0 {
		return 0
	}
	m := shapedRun(b, &c.shapes[c.last], dst)
	for k := 0; m == 0 && k < c.n; k++ {
		if k != c.last {
			if m = shapedRun(b, &c.shapes[k], dst); m > 0 {
				c.last = k
			}
		}
	}
	if m > 0 {
		c.fresh = 0
	}
	return m
}

// rest is told of a line that neither a shape nor fastLine read; ready
// says whether it was one for the shapes.
func (c *shapeCache) rest(ready bool) {
	switch {
	case !ready:
		c.idle = max(c.idle-1, 0)
	case c.misses+1 >= shapeMissRun:
		c.idle, c.misses, c.fresh = shapeIdleLines, 0, 0
	default:
		c.misses++
	}
}

// learn is told of a line of n bytes at the start of b that no shape held
// read and fastLine read as numbers of the columns cols; ready says
// whether it was one for the shapes. It keeps the line's shape in place
// of the oldest shape learned, or starts a rest (see shapeCache.idle).
func (c *shapeCache) learn(b []byte, n int, cols []column, ready bool) {
	if !ready {
		c.idle = max(c.idle-1, 0)
		return
	}
	s, ok := learnShape(b[:n], cols)
	if !ok || c.fresh+1 >= shapeMissRun {
		c.idle, c.misses, c.fresh = shapeIdleLines, 0, 0
		return
	}
	c.shapes[c.next], c.last, c.misses = s, c.next, 0
	c.fresh++
	c.next = (c.next + 1) % shapeSlots
	c.n = min(c.n+1, shapeSlots)
}
