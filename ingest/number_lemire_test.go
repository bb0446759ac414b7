package ingest

import (
	"math"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
)

// checkLemire compares eiselLemire with strconv.ParseFloat (the standard
// library's correctly rounded conversion) for ±man·10^exp10: when it
// answers, the same float64 bit for bit. It reports whether it answered.
func checkLemire(t *testing.T, man uint64, exp10 int, neg bool) bool {
	t.Helper()
	s := strconv.FormatUint(man, 10) + "e" + strconv.Itoa(exp10)
	if neg {
		s = "-" + s
	}
	want, err := strconv.ParseFloat(s, 64)
	got, ok := eiselLemire(man, exp10, neg)
	if ok && (err != nil || math.Float64bits(got) != math.Float64bits(want)) {
		t.Fatalf("eiselLemire(%s) = %v (%x); strconv %v (%x), %v", s, got, math.Float64bits(got),
			want, math.Float64bits(want), err)
	}
	return ok
}

// TestEiselLemireAgainstStrconv checks the conversion of long mantissas
// against strconv.ParseFloat: random mantissas of 1 to 19 digits over the
// table's exponents and beyond, the shortest forms of random float64
// values (what a program that prints its floats writes), and exact ties
// between two float64 values, which must round to even (IEEE 754-2008,
// 4.3.1) or be left to strconv (Lemire D., "Number parsing at a gigabyte
// per second", Software: Practice and Experience 51(8), 2021).
func TestEiselLemireAgainstStrconv(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 8))
	answered, tried := 0, 0
	for range 300000 {
		man := r.Uint64() >> r.IntN(64)
		if r.IntN(4) == 0 {
			man %= 10000000000000000000 // at most 19 digits
		}
		exp10 := r.IntN(2*lemireMaxExp10+21) - lemireMaxExp10 - 10
		if man >= 10000000000000000000 {
			man /= 10
		}
		tried++
		if checkLemire(t, man, exp10, r.IntN(2) == 0) {
			answered++
		}
	}
	// Outside the table and in the subnormal range it declines; nearly
	// everything else it decides.
	if answered < tried*8/10 {
		t.Errorf("answered %d of %d", answered, tried)
	}

	// Shortest forms: parseNumber reads every one back. Eisel–Lemire
	// declines a number it cannot tell from a tie with the truncated power:
	// an exact tie (a shortest form may lie halfway between its value and
	// the next, and round to its value by the tie rule), or a value with a
	// short exact decimal expansion, such as 2896682222447434.5, times an
	// inexact negative power. Among the magnitudes of signals (2^-30 to
	// 2^30) that is rare; it is counted there.
	const shortest = 200000
	undecided := 0
	for i := range shortest {
		signal := i%2 == 0
		v := math.Ldexp(1+r.Float64(), r.IntN(200)-100)
		if signal {
			v = math.Ldexp(1+r.Float64(), r.IntN(60)-30)
		}
		s := strconv.FormatFloat(v, 'e', -1, 64)
		man, exp10 := decimalParts(t, s)
		if !checkLemire(t, man, exp10, false) && signal {
			undecided++
		}
		if got, ok := parseNumber([]byte(s)); !ok || got != v {
			t.Fatalf("parseNumber(%s) = %v, %v; want %v", s, got, ok, v)
		}
	}
	if undecided > shortest/2/1000 {
		t.Errorf("%d of %d shortest forms of signal magnitudes not decided", undecided, shortest/2)
	}
	t.Logf("random mantissas: %d of %d decided; shortest forms of signal magnitudes: %d of %d undecided", answered, tried, undecided, shortest/2)

	// Ties: 2^53 + odd lies halfway between two float64 values 2 apart,
	// 2^54 + 2 mod 4 between two 4 apart.
	for range 100000 {
		k := r.Uint64N(1 << 52)
		for _, man := range []uint64{1<<53 + 2*k + 1, 1<<54 + 4*k + 2} {
			checkLemire(t, man, 0, false)
		}
	}
	for _, man := range []uint64{1<<53 + 1, 1<<53 + 3, 1<<54 + 2, 1<<54 + 6, 1<<63 + 1<<10, 1<<63 + 3<<10} {
		checkLemire(t, man, 0, false)
	}
}

// decimalParts splits the 'e' form of a positive number into its digits
// as an integer and the power of ten that scales them.
func decimalParts(t *testing.T, s string) (uint64, int) {
	t.Helper()
	m, e, ok := strings.Cut(s, "e")
	exp10, err := strconv.Atoi(e)
	if !ok || err != nil {
		t.Fatalf("%s: no exponent", s)
	}
	whole, frac, _ := strings.Cut(m, ".")
	man, err := strconv.ParseUint(whole+frac, 10, 64)
	if err != nil {
		t.Fatal(err)
	}
	return man, exp10 - len(frac)
}

// FuzzEiselLemire compares eiselLemire with strconv.ParseFloat on any
// mantissa of up to 19 digits and any exponent.
func FuzzEiselLemire(f *testing.F) {
	f.Add(uint64(9007199254740993), 0, false)
	f.Add(uint64(12345678901234567), -20, true)
	f.Add(uint64(1), 100, false)
	f.Fuzz(func(t *testing.T, man uint64, exp10 int, neg bool) {
		if man >= 10000000000000000000 {
			man /= 10
		}
		checkLemire(t, man, max(min(exp10, 400), -400), neg)
	})
}
