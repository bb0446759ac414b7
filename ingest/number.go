package ingest

import (
	"math"
	"strconv"
)

// pow10 holds the powers of ten that float64 represents exactly.
var pow10 = [...]float64{1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10,
	1e11, 1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22}

// parseNumber parses a decimal number such as "-12.5", "3e-2" or "+0.125"
// and reports false for anything else, including NaN and infinities.
//
// When the digits fit in 53 bits and the decimal exponent in ±22, the value
// is one correctly rounded multiplication or division of two exact float64
// numbers, hence the correctly rounded result (Clinger W.D., "How to read
// floating point numbers accurately", PLDI 1990). Other inputs go through
// strconv.ParseFloat, which is also correctly rounded; both paths agree.
func parseNumber(b []byte) (float64, bool) {
	i := 0
	neg := false
	if len(b) > 0 && (b[0] == '-' || b[0] == '+') {
		neg = b[0] == '-'
		i = 1
	}
	var mant uint64
	nd, exp10 := 0, 0
	digits, dot, trunc := false, false, false
	for ; i < len(b); i++ {
		c := b[i]
		switch {
		case c >= '0' && c <= '9':
			digits = true
			if mant == 0 && c == '0' {
				if dot {
					exp10--
				}
				continue
			}
			if nd < 19 {
				mant = mant*10 + uint64(c-'0')
				nd++
				if dot {
					exp10--
				}
			} else {
				trunc = true
				if !dot {
					exp10++
				}
			}
			continue
		case c == '.' && !dot:
			dot = true
			continue
		}
		break
	}
	if !digits {
		return 0, false
	}
	if i < len(b) && (b[i] == 'e' || b[i] == 'E') {
		i++
		eneg := false
		if i < len(b) && (b[i] == '-' || b[i] == '+') {
			eneg = b[i] == '-'
			i++
		}
		if i == len(b) {
			return 0, false
		}
		e := 0
		for ; i < len(b) && b[i] >= '0' && b[i] <= '9'; i++ {
			if e < 100000 {
				e = e*10 + int(b[i]-'0')
			}
		}
		if eneg {
			e = -e
		}
		exp10 += e
	}
	if i != len(b) {
		return 0, false
	}
	if !trunc && mant < 1<<53 && exp10 >= -22 && exp10 <= 22 {
		f := float64(mant)
		if exp10 < 0 {
			f /= pow10[-exp10]
		} else {
			f *= pow10[exp10]
		}
		if neg {
			f = -f
		}
		return f, true
	}
	// strconv copies the input into its error, so the conversion below does
	// not make b escape.
	f, err := strconv.ParseFloat(string(b), 64)
	if err != nil || math.IsInf(f, 0) || math.IsNaN(f) {
		return 0, false
	}
	return f, true
}
