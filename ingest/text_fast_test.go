package ingest

import (
	"encoding/binary"
	"math"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
)

// decodeBytewise decodes input one byte per Write: no line then reaches
// the fast lane (fastLines needs a field's shortReach bytes in one Write),
// so this is the general path alone, the reference of the fast lane.
func decodeBytewise(opts DecoderOptions, input []byte) (got, DecoderStats) {
	var g got
	d, _ := NewTextDecoder(opts, g.emit)
	for i := range input {
		_, _ = d.Write(input[i : i+1])
	}
	d.Flush()
	return g, d.Stats()
}

// decodeChunked decodes input in Writes of chunk() bytes, the fast lane
// handing on its samples one at a time or, with inRuns, in runs; it
// returns what was emitted, the counters and the number of runs.
func decodeChunked(opts DecoderOptions, input []byte, inRuns bool, chunk func() int) (got, DecoderStats, int) {
	var g got
	runs := 0
	if inRuns {
		opts.Runs = func(stream string, ss []Sample) {
			runs++
			for _, s := range ss {
				g.emit(stream, s)
			}
		}
	}
	d, _ := NewTextDecoder(opts, g.emit)
	for p := input; len(p) > 0; {
		k := min(len(p), chunk())
		_, _ = d.Write(p[:k])
		p = p[k:]
	}
	d.Flush()
	return g, d.Stats(), runs
}

// sameSamples reports whether two decodings emitted the same samples, bit
// for bit, on the same streams.
func sameSamples(a, b got) bool {
	if len(a.samples) != len(b.samples) {
		return false
	}
	bitsOf := func(s Sample) [4]uint64 {
		return [4]uint64{math.Float64bits(s.TimeS), math.Float64bits(s.PressureCmH2O), math.Float64bits(s.FlowLPS),
			math.Float64bits(s.VolumeL)}
	}
	for i := range a.samples {
		if bitsOf(a.samples[i]) != bitsOf(b.samples[i]) || a.streams[i] != b.streams[i] {
			return false
		}
	}
	return true
}

// TestTextFastLaneAgainstGeneral decodes random input, mostly ordinary
// sample lines with now and then a line the fast lane must leave to the
// general path (blanks, an exponent, a long number, an empty or extra
// field, a comment, "\r\n", a stray '\r', a header that changes the
// layout), in random chunks, and compares it with the general path alone:
// the same samples bit for bit, in the same order, and the same counters,
// whether the fast lane hands its samples on one at a time or in runs.
func TestTextFastLaneAgainstGeneral(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 17))
	fixed := false
	number := func() string {
		switch r.IntN(14) {
		case 0:
			return strconv.FormatFloat((r.Float64()-0.5)*1e9, 'f', r.IntN(9), 64) // long
		case 12, 13:
			// The shortest text of a computed value: long fractions.
			return strconv.FormatFloat((r.Float64()-0.5)*math.Pow(10, float64(r.IntN(10)-4)), 'f', -1, 64)
		case 1:
			return strconv.FormatFloat(r.Float64(), 'e', 3, 64)
		case 2:
			return " " + strconv.Itoa(r.IntN(100))
		case 3:
			return ""
		}
		if fixed {
			// As a sender writes: a fixed count of decimals, values
			// of a few sizes, so that line shapes repeat.
			return strconv.FormatFloat((r.Float64()-0.3)*math.Pow(10, float64(r.IntN(3))), 'f', 3, 64)
		}
		return strconv.FormatFloat((r.Float64()-0.3)*math.Pow(10, float64(r.IntN(6))), 'f', r.IntN(6), 64)
	}
	headers := []string{"time[s],pressure[cmH2O],flow[L/min]", "pressure[hPa],flow[L/s],time[ms]",
		"time[s],pressure[cmH2O],flow[L/min],volume[mL]", "stream,time[s],pressure[cmH2O],flow[L/min]",
		"time[s],note,pressure[cmH2O],flow[L/min]", "time[s],pressure[cmH2O],flow[L/min],note"}
	runs := 0
	for round := range 200 {
		fixed = round%2 == 1
		var sb strings.Builder
		cols := 3
		streamCol := false
		if round%4 == 3 {
			// Multiplexed input: a stream column first from the start.
			h := headers[3]
			sb.WriteString(h + "\n")
			cols, streamCol = strings.Count(h, ",")+1, true
		}
		for range 300 {
			switch k := r.IntN(60); {
			case k == 0:
				h := headers[r.IntN(len(headers))]
				cols, streamCol = strings.Count(h, ",")+1, strings.HasPrefix(h, "stream")
				sb.WriteString(h)
			case k == 1:
				sb.WriteString("# a comment")
			default:
				for c := range cols + r.IntN(8)/7 {
					if c > 0 {
						sb.WriteByte(',')
					}
					if c == 0 && streamCol {
						// Ids as senders write them, now and then one the
						// fast lane leaves to the general path or that no
						// table takes.
						sb.WriteString([]string{"bed-1", "bed-2", "icu_07", "B3", "bed-1", "bed-2", "", " bed-1",
							"bed 9", "bed-1 ", "x.y", strings.Repeat("z", 70)}[r.IntN(12)])
						continue
					}
					sb.WriteString(number())
				}
			}
			sb.WriteString([]string{"\n", "\n", "\n", "\n", "\n", "\n", "\r\n", "\r\r\n"}[r.IntN(8)])
		}
		input := []byte(sb.String())
		opts := DecoderOptions{RateHz: 50}
		want, wantStats := decodeBytewise(opts, input)
		// The fast lane handing on samples one at a time, then in runs
		// (DecoderOptions.Runs) interleaved with the general path's.
		for _, inRuns := range []bool{false, true} {
			g, st, n := decodeChunked(opts, input, inRuns, func() int { return 1 + r.IntN(4096) })
			runs += n
			if st != wantStats || !sameSamples(g, want) {
				t.Fatalf("round %d, runs %v: fast lane %+v (%d samples), general path %+v (%d samples)", round, inRuns,
					st, len(g.samples), wantStats, len(want.samples))
			}
		}
		if round == 0 && wantStats.Samples < 150 {
			t.Fatalf("only %d samples: the input is not mostly sample lines", wantStats.Samples)
		}
	}
	if runs < 1000 {
		t.Fatalf("the fast lane handed on only %d runs", runs)
	}
}

// TestTextFastLaneTakesOrdinaryLines checks that ordinary sample lines do
// take the fast lane, so that it cannot fall silently out of use.
func TestTextFastLaneTakesOrdinaryLines(t *testing.T) {
	var g got
	d, _ := NewTextDecoder(DecoderOptions{}, g.emit)
	_, _ = d.Write([]byte("time[s],pressure[cmH2O],flow[L/min]\n"))
	in := []byte("0.0050,15.1852,-50.0000\n0.0100,5.0000,0.5000\r\n0.0150,1234567.1234567,3\n0.0175, 2.5000, -1.2500\n")
	n := d.fastLines(append(in, "0.0200,1.0000,1.0000\n"...)) // the last line lacks room for its words
	if n != len(in) || len(g.samples) != 4 || g.samples[2].PressureCmH2O != 1234567.1234567 || g.samples[3].FlowLPS != -1.25/60 {
		t.Fatalf("fast lane took %d of %d bytes, %d samples: %+v", n, len(in), len(g.samples), g.samples)
	}
}

// checkFastNumber reads s as the first field of a line in the fast lane and
// compares what it takes with strconv.ParseFloat, the standard library's
// correctly rounded conversion: the same float64, bit for bit (the sign of
// zero included), and only numbers of the documented syntax, after at most
// one blank. What it leaves goes to the general path, checked against
// strconv in number_test.go.
func checkFastNumber(t *testing.T, s string) {
	t.Helper()
	if strings.ContainsAny(s, ",\r\n") {
		return // not one field
	}
	cols := []column{{kind: colPressure, unit: unit{mul: 1}}, {kind: colFlow, unit: unit{mul: 1}}}
	line := []byte(s + ",1\n" + "99999999.99999999e99,1\n") // room for the words, digits beyond the line
	smp, n, ok := fastLine(line, cols)
	if !ok {
		return
	}
	num := strings.TrimPrefix(s, " ") // the one blank the lane allows before a number
	want, err := strconv.ParseFloat(num, 64)
	if n != len(s)+3 || !decimalSyntax.MatchString(num) || err != nil ||
		math.Float64bits(smp.PressureCmH2O) != math.Float64bits(want) || smp.FlowLPS != 1 {
		t.Fatalf("fast lane read %q as %v (%x), %d bytes; strconv %v (%x), %v", s, smp.PressureCmH2O,
			math.Float64bits(smp.PressureCmH2O), n, want, math.Float64bits(want), err)
	}
}

// TestFastLineAgainstStrconv runs the comparison on the edges of the fast
// lane's number form and on many random numbers.
func TestFastLineAgainstStrconv(t *testing.T) {
	taken := 0
	for _, s := range []string{"0", "-0", "+0", "0.0", "-0.0000", "5.", ".5", "-.5", "+.5", "-", "+", ".", "-.",
		"9999999.9999999", "-9999999.9999999", "99999999.5", "0.99999999", "12345678", "1234567.12345678",
		"0000000.0000001", "1e5", "1.5e", "1.2.3", "1..2", "--1", "1\xff", "\xb9", "1\x80", "0.1", "0.3", "3599.9950",
		// Fractions that go on into a second word.
		"0.123456789012345", "-0.1234567890123456", "15.041887779554038", "47.99957889749461",
		"1234567.123456789012", "9999999.999999999999", "1234567.1234567890123", "9007199.254740993",
		"9007199.2547409935", ".123456789", "-.0000000000000001", "0.00000000", "0.000000000000000", "12.12345678x",
		// and into a third.
		"1.0050000000000001", "0.0012345678901234567", "-0.00000000000000000000001", "0.000000000000000000000001",
		"1234567.12345678901234567", "0.99999999999999999999999", "18.446744073709551615", "18.446744073709551616",
		"0.18446744073709551616", "1.000000000000000000000", "0.0000000000000000000000",
		// Short values written with many decimals: trailing zeros.
		"1.500000000000000000", "50.00000000000000000", "-0.125000000000000000"} {
		checkFastNumber(t, s)
	}
	r := rand.New(rand.NewPCG(8, 13))
	for range 200000 {
		s := strconv.FormatFloat((r.Float64()-0.5)*math.Pow(10, float64(r.IntN(16)-8)), 'f', r.IntN(10), 64)
		if _, _, ok := fastLine([]byte(s+",1\n"+strings.Repeat("7", fastReach)), []column{{kind: colPressure}, {kind: colFlow}}); ok {
			taken++
		}
		checkFastNumber(t, s)
	}
	if taken < 50000 {
		t.Fatalf("the fast lane took only %d of 200000 ordinary numbers", taken)
	}
	// The shortest text of computed values of a signal's magnitudes: their
	// fractions mostly go on into a second or third word.
	long := 0
	for range 200000 {
		s := strconv.FormatFloat((r.Float64()-0.5)*math.Pow(10, float64(r.IntN(12)-5)), 'f', -1, 64)
		line := []byte(s + ",1\n" + strings.Repeat("7", 24))
		if _, _, ok := fastLine(line, []column{{kind: colPressure}, {kind: colFlow}}); ok && len(s) > 12 {
			long++
		}
		checkFastNumber(t, s)
	}
	if long < 100000 {
		t.Fatalf("the fast lane took only %d of 200000 shortest texts longer than 12 bytes", long)
	}
}

// FuzzFastLine compares the fast lane's numbers with strconv.ParseFloat on
// any input.
func FuzzFastLine(f *testing.F) {
	for _, s := range []string{"0", "-12.5", "15.1852", "9999999.9999999", "1e5", ".5", "5.", "0x1p3"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) { checkFastNumber(t, s) })
}

// TestLeadingDigits compares the word-at-a-time digit count with a byte
// loop: every byte value after every count of leading digits, followed by
// random bytes, and random words.
func TestLeadingDigits(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	loop := func(b []byte) int {
		n := 0
		for n < len(b) && b[n] >= '0' && b[n] <= '9' {
			n++
		}
		return n
	}
	check := func(b []byte) {
		if got, want := leadingDigits(binary.LittleEndian.Uint64(b)), loop(b); got != want {
			t.Fatalf("leadingDigits(%q) = %d, want %d", b, got, want)
		}
	}
	b := make([]byte, 8)
	for k := range 8 {
		for c := range 256 {
			for range 20 {
				for i := range b {
					b[i] = byte(r.Uint32())
				}
				for i := range k {
					b[i] = byte('0' + r.IntN(10))
				}
				b[k] = byte(c)
				check(b)
			}
		}
	}
	for range 100000 {
		binary.LittleEndian.PutUint64(b, r.Uint64())
		check(b)
	}
}
