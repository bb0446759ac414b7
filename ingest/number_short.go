package ingest

import (
	"encoding/binary"
	"math/bits"
)

// fastReach is how many bytes from the start of a field the fast lane
// reads: a sign, 7 digits, a '.', the 8 bytes of the fraction's word, and
// the two bytes of a line end.
const fastReach = 19

// pow10u holds the powers of ten that an integer part is scaled by when
// its digits and the fraction's do not fit one word.
var pow10u = [...]uint64{1, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8}

// leadingDigits returns how many of the 8 bytes of w, first byte in the
// low bits, are ASCII digits before the first byte that is not one. It
// subtracts '0' from every byte and tests t < 10 per byte as the high bit
// of t+0x76 or of t itself. Borrows and carries between bytes only run
// from a byte that is not a digit into the later ones, whose results no
// longer matter; the bytes up to the first non-digit are exact
// (bit-parallel byte tests, common practice; Warren H.S., "Hacker's
// Delight", 2nd ed., 2012, ch. 6, from memory).
func leadingDigits(w uint64) int {
	t := w - 0x3030303030303030
	nonDigit := ((t + 0x7676767676767676) | t) & 0x8080808080808080
	return bits.TrailingZeros64(nonDigit) >> 3 // 8 when all are digits
}

// digitsValue returns the value of the first k (0 to 8) digits of w, first
// byte in the low bits, as a decimal integer. The digits are moved to the
// top of the word, below zeros that read as leading zeros, and combined in
// three multiplications: pairs, then quadruples, then all eight (Lemire D.,
// "Number parsing at a gigabyte per second", Software: Practice and
// Experience 51(8), 2021, eight-digit parsing, from memory).
func digitsValue(w uint64, k int) uint64 {
	v := (w & 0x0F0F0F0F0F0F0F0F) << (8 * (8 - uint(k))) // k = 0 shifts everything out
	v = (v * (10<<8 + 1)) >> 8
	v = ((v & 0x00FF00FF00FF00FF) * (100<<16 + 1)) >> 16
	return ((v & 0x0000FFFF0000FFFF) * (10000<<32 + 1)) >> 32
}

// longFraction values a field of the fast lane whose fraction fills its
// first word: f is the field's line from its start, at where the fraction
// begins, word the integer part's k1 digits and frac the fraction's first
// eight. The fraction may go on for up to two more words, 23 digits in
// all (the shortest text of a computed value has up to 17 significant
// digits, after any leading zeros); it returns the number's magnitude (the
// caller applies the sign), where it ends in f, and false when it is
// longer, when its digits make an integer of 2^64 or more, or when f
// lacks the bytes of a word and of a line end after it. The value is
// decimalValue's, as the general path's, and false where that cannot
// decide.
func longFraction(f []byte, at int, word, frac uint64, k1 int) (float64, int, bool) {
	mant := digitsValue(word, k1)*1e8 + digitsValue(frac, 8) // below 10^15
	end := at + 8
	for words := 0; ; words++ {
		if len(f)-end < 9 || words == 2 {
			return 0, 0, false
		}
		next := binary.LittleEndian.Uint64(f[end:])
		k := leadingDigits(next)
		hi, lo := bits.Mul64(mant, pow10u[k])
		lo, carry := bits.Add64(lo, digitsValue(next, k), 0)
		if hi|carry != 0 {
			return 0, 0, false
		}
		mant, end = lo, end+k
		if k < 8 {
			break
		}
	}
	v, ok := decimalValue(mant, at-end, false)
	return v, end, ok
}
