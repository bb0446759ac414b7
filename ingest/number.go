package ingest

import (
	"encoding/binary"
	"math"
	"strconv"
)

// pow10 holds the powers of ten that float64 represents exactly.
var pow10 = [...]float64{1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10,
	1e11, 1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22}

// parseNumber parses a decimal number such as "-12.5", "3e-2" or "+0.125"
// and reports false for anything else, including NaN, infinities,
// hexadecimal and digit separators.
//
// One pass checks the syntax and gathers the digits into an integer. When
// there are at most 19 of them (so the integer cannot overflow), the integer
// is below 2^53 (so it is exact as a float64) and the decimal exponent is
// within ±22 (so the power of ten is exact too), the value is one correctly
// rounded multiplication or division of two exact float64 numbers, hence the
// correctly rounded result (Clinger W.D., "How to read floating point numbers
// accurately", PLDI 1990). Samples written with a few decimals always take
// this path. Up to 19 significant digits otherwise (the shortest form of a
// computed float64 has 16 or 17) take the Eisel–Lemire algorithm
// (eiselLemire), correctly rounded too. Other inputs, and the rare ones
// Eisel–Lemire cannot decide, whose syntax is known to be right by then,
// go through strconv.ParseFloat, which is also correctly rounded: every
// path gives the same float64.
func parseNumber(b []byte) (float64, bool) {
	v, n, ok := scanNumber(b)
	return v, ok && n == len(b)
}

// scanNumber parses the decimal number at the start of b as parseNumber
// does and returns its value and length; it reports false when b does not
// start with one or when the number runs into a character that cannot end
// it (a letter, a second '.', an exponent without digits). A text decoder
// uses it to read a field and find its end in one pass.
func scanNumber(b []byte) (float64, int, bool) {
	i := 0
	neg := false
	if len(b) > 0 && (b[0] == '-' || b[0] == '+') {
		neg = b[0] == '-'
		i = 1
	}
	var mant uint64
	start := i
	for ; i < len(b); i++ {
		c := b[i] - '0'
		if c > 9 {
			break
		}
		mant = mant*10 + uint64(c)
	}
	nd := i - start
	exp10 := 0
	if i < len(b) && b[i] == '.' {
		i++
		frac := i
		// A long fraction is read eight digits at a time (leadingDigits,
		// digitsValue) while eight bytes remain; past 19 digits mant
		// wraps, and is then not used.
		for len(b)-i >= 8 {
			w := binary.LittleEndian.Uint64(b[i:])
			k := leadingDigits(w)
			mant = mant*pow10u[k] + digitsValue(w, k)
			i += k
			if k < 8 {
				break
			}
		}
		for ; i < len(b); i++ {
			c := b[i] - '0'
			if c > 9 {
				break
			}
			mant = mant*10 + uint64(c)
		}
		nd += i - frac
		exp10 = frac - i
	}
	if nd == 0 {
		return 0, 0, false
	}
	if i < len(b) && (b[i] == 'e' || b[i] == 'E') {
		e, n, ok := scanExponent(b[i+1:])
		if !ok {
			return 0, 0, false
		}
		exp10 += e
		i += 1 + n
	}
	if i < len(b) && !endsNumber(b[i]) {
		return 0, 0, false
	}
	if nd <= 19 && mant < 1<<53 && exp10 >= -22 && exp10 <= 22 {
		return exactNumber(mant, exp10, neg), i, true
	}
	f, ok := longNumber(b[:i], b[start:i], mant, nd, exp10, neg)
	if !ok {
		return 0, 0, false
	}
	return f, i, true
}

// longNumber is the value of the number b when scanNumber's exact path
// does not apply: by Eisel–Lemire when it can decide, by
// strconv.ParseFloat otherwise. digits is b from its first digit; nd
// counts the digits, which scanNumber gathered into mant (exactly when at
// most 19 of them are significant), and exp10 is the decimal exponent that
// scales mant. Kept apart so that scanNumber's common path stays small.
func longNumber(b, digits []byte, mant uint64, nd, exp10 int, neg bool) (float64, bool) {
	if nd > 19 {
		// Leading zeros add nothing to the mantissa.
		nd -= leadingZeros(digits)
	}
	if nd <= 19 {
		if f, ok := decimalValue(mant, exp10, neg); ok {
			return f, true
		}
	}
	// strconv copies the input into its error, so the conversion below does
	// not make b escape.
	f, err := strconv.ParseFloat(string(b), 64)
	if err != nil || math.IsInf(f, 0) || math.IsNaN(f) {
		return 0, false
	}
	return f, true
}

// decimalValue is ±mant·10^exp10, mant exact, correctly rounded, or false
// when none of the routes below can decide it: exactly (exactNumber), by
// Eisel–Lemire, and with trailing zeros moved into the exponent (a value
// with few digits written with many, as "%.18e" writes 50), exactly again:
// Eisel–Lemire, working from a truncated power, often cannot decide such a
// value. The zeros are looked for only then, since the shortest text of a
// value, the common long number, has none.
func decimalValue(mant uint64, exp10 int, neg bool) (float64, bool) {
	if mant < 1<<53 && exp10 >= -22 && exp10 <= 22 {
		return exactNumber(mant, exp10, neg), true
	}
	if f, ok := eiselLemire(mant, exp10, neg); ok {
		return f, true
	}
	mant, exp10 = trimZeros(mant, exp10)
	if mant < 1<<53 && exp10 >= -22 && exp10 <= 22 {
		return exactNumber(mant, exp10, neg), true
	}
	return eiselLemire(mant, exp10, neg)
}

// trimZeros moves the trailing zero digits of mant into its decimal
// exponent exp10.
func trimZeros(mant uint64, exp10 int) (uint64, int) {
	if mant == 0 {
		return 0, exp10
	}
	for mant%1e8 == 0 {
		mant, exp10 = mant/1e8, exp10+8
	}
	for mant%10 == 0 {
		mant, exp10 = mant/10, exp10+1
	}
	return mant, exp10
}

// exactNumber is ±mant·10^exp10 for mant below 2^53 and exp10 within ±22:
// both exact as float64 values, so one correctly rounded operation (Clinger,
// see parseNumber).
func exactNumber(mant uint64, exp10 int, neg bool) float64 {
	f := float64(mant)
	if exp10 < 0 {
		f /= pow10[-exp10]
	} else {
		f *= pow10[exp10]
	}
	if neg {
		f = -f
	}
	return f
}

// leadingZeros counts the zero digits at the start of b, a number's
// digits and point, before its first other character.
func leadingZeros(b []byte) int {
	n := 0
	for _, c := range b {
		switch c {
		case '0':
			n++
		case '.':
		default:
			return n
		}
	}
	return n
}

// endsNumber reports whether c may follow a number in a field: the field
// separator or a blank before it.
func endsNumber(c byte) bool { return c == ',' || c == ' ' || c == '\t' }

// scanExponent reads the digits of a decimal exponent with an optional
// sign at the start of b, and returns it and its length; its magnitude is
// capped far beyond any float64 exponent.
func scanExponent(b []byte) (int, int, bool) {
	i := 0
	neg := false
	if len(b) > 0 && (b[0] == '-' || b[0] == '+') {
		neg = b[0] == '-'
		i = 1
	}
	start := i
	e := 0
	for ; i < len(b); i++ {
		c := b[i] - '0'
		if c > 9 {
			break
		}
		if e < 100000 {
			e = e*10 + int(c)
		}
	}
	if i == start {
		return 0, 0, false
	}
	if neg {
		e = -e
	}
	return e, i, true
}
