package ingest

import (
	"math"
	"math/rand/v2"
	"regexp"
	"strconv"
	"strings"
	"testing"
)

// decimalSyntax is the number syntax of the sample line format v1
// (docs/framing.md): decimal, optional sign, optional exponent.
var decimalSyntax = regexp.MustCompile(`^[+-]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][+-]?[0-9]+)?$`)

// checkParse compares parseNumber with strconv.ParseFloat, the standard
// library's correctly rounded conversion: the same float64, bit for bit
// (the sign of zero included), for every input of the documented syntax
// whose value is finite, and a refusal for everything else.
func checkParse(t *testing.T, s string) {
	t.Helper()
	got, ok := parseNumber([]byte(s))
	want, err := strconv.ParseFloat(s, 64)
	accept := decimalSyntax.MatchString(s) && err == nil && !math.IsInf(want, 0) && !math.IsNaN(want)
	if ok != accept || ok && math.Float64bits(got) != math.Float64bits(want) {
		t.Fatalf("parseNumber(%q) = %v (%x), %v; strconv %v (%x), %v", s, got, math.Float64bits(got), ok,
			want, math.Float64bits(want), err)
	}
}

// TestParseNumberAgainstStrconv runs the comparison on edge cases of the
// fast path's limits and on many random inputs.
func TestParseNumberAgainstStrconv(t *testing.T) {
	edges := []string{
		"0", "-0", "+0", "0.0", "-0.000", "-0e5", "00000000000000000000000001", "0.00000000000000000000001",
		"9007199254740991", "9007199254740992", "9007199254740993", "-9007199254740993", "900719925474099.3",
		"1234567890123456789", "12345678901234567890", "18446744073709551615", "18446744073709551616",
		"999999999999999999", "9999999999999999999", "99999999999999999999", "0.1", "0.2", "0.3",
		"1e22", "1e23", "1e-22", "1e-23", "123e20", "123e-25", "4.35e-22", "1.7976931348623157e308",
		"1.7976931348623159e308", "4.9e-324", "2.4e-324", "1e-400", "1e400", "-1e400", "1e+0", "1E-0",
		"1e99999999999999999999", "1e-99999999999999999999", ".5", "5.", "-.5e1", "+5.e-1", "000012.5000",
		"1.00000000000000011102230246251565404236316680908203125", "7.038531e-26", "2.2250738585072011e-308",
		"", "-", "+", ".", "-.", "e5", ".e5", "1e", "1e+", "1e-", "1ee5", "1e5.5", "0x10", "0x1p3", "1_000",
		"inf", "-Inf", "NaN", "infinity", "1,5", "1 5", " 1", "1 ", "--1", "+-1", "1.2.3", "1e5e5", "١",
		// Short values written long, as NumPy's "%.18e" writes them: the
		// trailing zeros go into the exponent.
		"5.000000000000000000e+01", "1.350000000000000000e+01", "5.000000000000000104e-03",
		"1.000000000000000000e+22", "1.000000000000000000e+23", "9.007199254740993000e+15",
		"0.000000000000000000e+00", "-0.000000000000000000e+00", "1.0000000000000000000", "100000000000000000000e-20",
	}
	for _, s := range edges {
		checkParse(t, s)
	}
	r := rand.New(rand.NewPCG(15, 53))
	for range 200000 {
		checkParse(t, randomNumber(r))
	}
	// "%.18e" of random values, and of values with few digits.
	for i := range 100000 {
		v := math.Ldexp(1+r.Float64(), r.IntN(120)-60)
		if i%2 == 0 {
			v = float64(r.IntN(100000)) / math.Pow(10, float64(r.IntN(8)))
		}
		checkParse(t, strconv.FormatFloat(v, 'e', 18, 64))
	}
}

// randomNumber returns a random decimal number (mostly of the documented
// syntax, some of it broken) with 1 to 25 digits and exponents around the
// fast path's limits, or the text of a random float64.
func randomNumber(r *rand.Rand) string {
	var sb strings.Builder
	switch r.IntN(4) {
	case 0:
		v := math.Float64frombits(r.Uint64())
		if math.IsNaN(v) || math.IsInf(v, 0) {
			v = 1.5
		}
		return strconv.FormatFloat(v, "eEfg"[r.IntN(4)], r.IntN(20)-1, 64)
	case 1:
		v := (r.Float64() - 0.5) * math.Pow(10, float64(r.IntN(12)-6))
		return strconv.FormatFloat(v, 'f', r.IntN(8), 64)
	}
	if r.IntN(3) == 0 {
		sb.WriteByte("+-"[r.IntN(2)])
	}
	nd := 1 + r.IntN(25)
	dot := r.IntN(nd + 2)
	for k := range nd {
		if k == dot {
			sb.WriteByte('.')
		}
		sb.WriteByte(byte('0' + r.IntN(10)))
	}
	if r.IntN(2) == 0 {
		sb.WriteByte("eE"[r.IntN(2)])
		if r.IntN(2) == 0 {
			sb.WriteByte("+-"[r.IntN(2)])
		}
		sb.WriteString(strconv.Itoa(r.IntN(40)))
	}
	s := []byte(sb.String())
	if r.IntN(20) == 0 { // break one character
		s[r.IntN(len(s))] = "x_.e+- ,i"[r.IntN(9)]
	}
	return string(s)
}

// FuzzParseNumber compares parseNumber with strconv.ParseFloat on any input.
func FuzzParseNumber(f *testing.F) {
	for _, s := range []string{"0", "-12.5", "3e-2", "9007199254740993", "1e23", "0.1", "1_0", "0x1p3"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) { checkParse(t, s) })
}

func BenchmarkParseNumber(b *testing.B) {
	in := [][]byte{[]byte("5.123"), []byte("-12.5"), []byte("0.0625"), []byte("123.4567"), []byte("-0.8333333333333334")}
	var sum float64
	b.ReportAllocs()
	for b.Loop() {
		for _, s := range in {
			v, _ := parseNumber(s)
			sum += v
		}
	}
	if sum == 0 {
		b.Fatal("nothing parsed")
	}
}

// TestTextFieldsAgainstReference decodes random lines, made of numbers
// good and bad, blanks and commas, and compares each outcome with a plain
// reading of the format: split at commas, trim blanks, check the number
// syntax and convert with strconv.ParseFloat.
func TestTextFieldsAgainstReference(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 4))
	tokens := []string{"", " ", "\t", "0", "-1.5", "12.25", "3e-2", "7E+1", "1e400", "5.", ".5", "-", "e",
		"1.2.3", "x", "NaN", "1 2", "0x1"}
	field := func() string {
		var sb strings.Builder
		for range 1 + r.IntN(3) {
			sb.WriteString(tokens[r.IntN(len(tokens))])
		}
		return sb.String()
	}
	for range 20000 {
		nf := 1 + r.IntN(5)
		fields := make([]string, nf)
		for i := range fields {
			fields[i] = field()
		}
		line := strings.Join(fields, ",")
		want, wantOK := referenceLine(line)
		var got []Sample
		d, _ := NewTextDecoder(DecoderOptions{Columns: "time[s],pressure[cmH2O],flow[L/min],volume[mL]"},
			func(_ string, s Sample) { got = append(got, s) })
		d.data([]byte(line))
		if wantOK != (len(got) == 1) || wantOK && (got[0] != want && !(math.IsNaN(got[0].VolumeL) && math.IsNaN(want.VolumeL) &&
			got[0].TimeS == want.TimeS && got[0].PressureCmH2O == want.PressureCmH2O && got[0].FlowLPS == want.FlowLPS)) {
			t.Fatalf("line %q: decoded %+v, reference %+v (%v)", line, got, want, wantOK)
		}
	}
}

// referenceLine reads a data line of the layout time[s], pressure[cmH2O],
// flow[L/min], volume[mL] the plain way.
func referenceLine(line string) (Sample, bool) {
	f := strings.Split(line, ",")
	if len(f) < 4 {
		return Sample{}, false
	}
	var v [4]float64
	for i := range 4 {
		x := strings.Trim(f[i], " \t")
		if i == 3 && x == "" {
			v[i] = math.NaN()
			continue
		}
		if !decimalSyntax.MatchString(x) {
			return Sample{}, false
		}
		y, err := strconv.ParseFloat(x, 64)
		if err != nil || math.IsInf(y, 0) {
			return Sample{}, false
		}
		v[i] = y
	}
	s := Sample{TimeS: v[0], PressureCmH2O: v[1], FlowLPS: v[2] / 60, VolumeL: v[3] / 1000}
	return s, true
}
