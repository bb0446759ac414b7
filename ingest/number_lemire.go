package ingest

import (
	"math"
	"math/big"
	"math/bits"
)

// Numbers with more significant digits than a float64 holds exactly (the
// shortest form of a computed value, as many programs print it, has 16 or
// 17) are converted by the Eisel–Lemire algorithm (Lemire D., "Number
// parsing at a gigabyte per second", Software: Practice and Experience
// 51(8), 2021): the decimal mantissa, up to 19 digits, times a 128-bit
// truncation of the power of ten, rounded to 53 bits, which is exact
// unless the product lies too near a halfway point, when it reports
// failure and the caller falls back to strconv.ParseFloat. scanNumber has
// gathered the mantissa already, so the digits are not read again.

// Exponents of ten the table covers: far beyond any signal's numbers;
// others take strconv.ParseFloat.
const (
	lemireMinExp10 = -100
	lemireMaxExp10 = 100
)

// lemirePow is the power of ten 10^e as a 128-bit mantissa rounded down,
// hi·2^64 + lo in [2^127, 2^128), and its binary exponent exp2 =
// ⌊e·log2 10⌋: 10^e ≈ (hi·2^64 + lo)·2^(exp2−127).
type lemirePow struct {
	hi, lo uint64
	exp2   int
}

// lemirePows holds the powers from lemireMinExp10 to lemireMaxExp10,
// computed exactly with math/big when the package loads.
var lemirePows = func() []lemirePow {
	pows := make([]lemirePow, 0, lemireMaxExp10-lemireMinExp10+1)
	ten := big.NewInt(10)
	mask := new(big.Int).SetUint64(math.MaxUint64)
	for e := lemireMinExp10; e <= lemireMaxExp10; e++ {
		p := new(big.Int).Exp(ten, big.NewInt(int64(max(e, -e))), nil)
		l := p.BitLen()
		var m *big.Int
		var exp2 int
		if e >= 0 {
			// 10^e·2^(128−l): exact when shifted left, rounded down when
			// shifted right.
			if l <= 128 {
				m = new(big.Int).Lsh(p, uint(128-l))
			} else {
				m = new(big.Int).Rsh(p, uint(l-128))
			}
			exp2 = l - 1
		} else {
			// 2^(127+l)/10^|e| lies in (2^127, 2^128): 10^|e| is not a power
			// of two.
			m = new(big.Int).Quo(new(big.Int).Lsh(big.NewInt(1), uint(127+l)), p)
			exp2 = -l
		}
		lo := new(big.Int).And(m, mask).Uint64()
		hi := new(big.Int).Rsh(m, 64).Uint64()
		pows = append(pows, lemirePow{hi: hi, lo: lo, exp2: exp2})
	}
	return pows
}()

// eiselLemire returns the float64 nearest to ±man·10^exp10, correctly
// rounded, or false when it cannot tell (a product too near a halfway
// point, an exponent outside the table, a result out of the normal range):
// the caller then takes strconv.ParseFloat. man is the exact decimal
// mantissa.
func eiselLemire(man uint64, exp10 int, neg bool) (float64, bool) {
	if man == 0 {
		if neg {
			return math.Copysign(0, -1), true
		}
		return 0, true
	}
	if exp10 < lemireMinExp10 || exp10 > lemireMaxExp10 {
		return 0, false
	}
	pw := &lemirePows[exp10-lemireMinExp10]
	// Normalise the mantissa so that its top bit is set.
	clz := bits.LeadingZeros64(man)
	man <<= uint(clz)
	const bias = 1023
	retExp2 := uint64(pw.exp2+64+bias) - uint64(clz)
	// The top 64 bits of the 192-bit product, from the high half of the
	// power; the low half is needed only when the lower bits might carry.
	xHi, xLo := bits.Mul64(man, pw.hi)
	if xHi&0x1FF == 0x1FF && xLo+man < man {
		yHi, yLo := bits.Mul64(man, pw.lo)
		mergedHi, mergedLo := xHi, xLo+yHi
		if mergedLo < xLo {
			mergedHi++
		}
		if mergedHi&0x1FF == 0x1FF && mergedLo+1 == 0 && yLo+man < man {
			return 0, false
		}
		xHi, xLo = mergedHi, mergedLo
	}
	// Keep 54 bits: the 53 of the result and one to round with.
	msb := xHi >> 63
	mant := xHi >> (msb + 9)
	retExp2 -= 1 ^ msb
	// Exactly halfway as far as the truncated power can tell: undecided.
	if xLo == 0 && xHi&0x1FF == 0 && mant&3 == 1 {
		return 0, false
	}
	// Round on the 54th bit, and take the carry into the exponent. A tie
	// that rounding up would leave odd was refused above; any other tie
	// rounds up to even, as round-half-even wants.
	mant += mant & 1
	mant >>= 1
	if mant>>53 > 0 {
		mant >>= 1
		retExp2++
	}
	// Subnormal results and overflow are left to strconv.
	if retExp2-1 >= 0x7FF-1 {
		return 0, false
	}
	b := retExp2<<52 | mant&(1<<52-1)
	if neg {
		b |= 1 << 63
	}
	return math.Float64frombits(b), true
}
