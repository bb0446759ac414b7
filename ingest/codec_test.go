package ingest

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
)

// got collects decoded samples per stream.
type got struct {
	streams []string
	samples []Sample
}

func (g *got) emit(stream string, s Sample) {
	g.streams = append(g.streams, stream)
	g.samples = append(g.samples, s)
}

// testSignal is an invented breathing-like signal: a 20 /min cycle with a
// pressure between 5 and 25 cmH2O and a flow of ±0.8 L/s, sampled at rateHz.
func testSignal(n int, rateHz float64, volume bool) []Sample {
	out := make([]Sample, n)
	for i := range out {
		t := float64(i) / rateHz
		ph := 2 * math.Pi * t / 3
		s := Sample{
			TimeS:         t,
			PressureCmH2O: 15 + 10*math.Sin(ph),
			FlowLPS:       0.8 * math.Cos(ph),
			VolumeL:       NoVolume,
		}
		if volume {
			s.VolumeL = 0.25 + 0.25*math.Sin(ph)
		}
		out[i] = s
	}
	return out
}

func sameFloat(a, b float64) bool { return a == b || math.IsNaN(a) && math.IsNaN(b) }

func near(a, b, tol float64) bool {
	if math.IsNaN(a) || math.IsNaN(b) {
		return math.IsNaN(a) && math.IsNaN(b)
	}
	return math.Abs(a-b) <= tol
}

func TestTextRoundTrip(t *testing.T) {
	in := testSignal(500, 100, true)
	in[7].VolumeL = NoVolume
	tests := []struct {
		name string
		enc  TextEncoderOptions
		dec  DecoderOptions
	}{
		{"default header", TextEncoderOptions{}, DecoderOptions{}},
		{"volume and stream column", TextEncoderOptions{Volume: true, Stream: true}, DecoderOptions{}},
		{"crlf", TextEncoderOptions{Volume: true, CRLF: true}, DecoderOptions{}},
		{"headerless default", TextEncoderOptions{NoHeader: true}, DecoderOptions{}},
		{"headerless configured", TextEncoderOptions{NoHeader: true, Volume: true, Stream: true, FlowUnit: "L/s"},
			DecoderOptions{Columns: "stream,time[s],pressure[cmH2O],flow[L/s],volume[mL]"}},
		{"no time column", TextEncoderOptions{NoTime: true}, DecoderOptions{RateHz: 100}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			enc, err := NewTextEncoder(tc.enc)
			if err != nil {
				t.Fatal(err)
			}
			buf := append([]byte(nil), enc.Header()...)
			for i, s := range in {
				buf = enc.Append(buf, []string{"bed-1", "bed_2"}[i%2], s)
			}
			var g got
			d, err := NewTextDecoder(tc.dec, g.emit)
			if err != nil {
				t.Fatal(err)
			}
			if err := Decode(bytes.NewReader(buf), d); err != nil {
				t.Fatal(err)
			}
			if st := d.Stats(); st.BadLines != 0 || st.Samples != uint64(len(in)) || d.Err() != nil {
				t.Fatalf("stats %+v, err %v", st, d.Err())
			}
			perStream := map[string]int{}
			for i, s := range g.samples {
				want := in[i]
				if !tc.enc.Volume {
					want.VolumeL = NoVolume
				}
				wantStream := DefaultStream
				if tc.enc.Stream {
					wantStream = []string{"bed-1", "bed_2"}[i%2]
				}
				if g.streams[i] != wantStream {
					t.Fatalf("sample %d: stream %q, want %q", i, g.streams[i], wantStream)
				}
				if tc.enc.NoTime {
					// Without a time column, time is the per-stream index over the rate.
					want.TimeS = float64(perStream[g.streams[i]]) / 100
					perStream[g.streams[i]]++
				}
				// Shortest formatting reads back to the identical float64
				// for the s and cmH2O columns; a unit conversion may cost
				// one rounding on each side.
				if !near(s.TimeS, want.TimeS, 1e-12) || !sameFloat(s.PressureCmH2O, want.PressureCmH2O) ||
					!near(s.FlowLPS, want.FlowLPS, 1e-15) || !near(s.VolumeL, want.VolumeL, 1e-15) {
					t.Fatalf("sample %d: got %+v, want %+v", i, s, want)
				}
			}
		})
	}
}

// TestTextUnits writes the same signal in three sets of units and checks that
// it reads back as the same samples. The factors are those of the units
// reference: 1 hPa = 1.019716 cmH2O, 1 kPa = 10.19716 cmH2O (exact SI units, docs/formulas.md,
// BIPM SI Brochure 9th ed. 2019 for Pa; 1 cmH2O = 98.0665 Pa by definition).
func TestTextUnits(t *testing.T) {
	in := testSignal(300, 50, true)
	sets := []TextEncoderOptions{
		{PressureUnit: "cmH2O", FlowUnit: "L/min", VolumeUnit: "mL", Volume: true},
		{PressureUnit: "hPa", FlowUnit: "L/s", VolumeUnit: "L", Volume: true, TimeUnit: "ms"},
		{PressureUnit: "kPa", FlowUnit: "mL/s", VolumeUnit: "mL", Volume: true},
		{PressureUnit: "mbar", FlowUnit: "L/min", Volume: true, Decimals: 6},
	}
	var results [][]Sample
	for _, opts := range sets {
		enc, err := NewTextEncoder(opts)
		if err != nil {
			t.Fatal(err)
		}
		buf := append([]byte(nil), enc.Header()...)
		for _, s := range in {
			buf = enc.Append(buf, "", s)
		}
		var g got
		d, _ := NewTextDecoder(DecoderOptions{}, g.emit)
		_ = Decode(bytes.NewReader(buf), d)
		if len(g.samples) != len(in) {
			t.Fatalf("%+v: %d samples, want %d (%+v)", opts, len(g.samples), len(in), d.Stats())
		}
		results = append(results, g.samples)
	}
	for k, r := range results {
		for i, s := range r {
			if !near(s.TimeS, in[i].TimeS, 1e-9) || !near(s.PressureCmH2O, in[i].PressureCmH2O, 1e-5) ||
				!near(s.FlowLPS, in[i].FlowLPS, 1e-7) || !near(s.VolumeL, in[i].VolumeL, 1e-7) {
				t.Fatalf("unit set %d sample %d: %+v, want %+v", k, i, s, in[i])
			}
		}
	}
	// The hand-written values of the units reference, read through a header.
	const text = "pressure[hPa],flow[L/s],time[s]\n10,1,0\npressure[kPa],flow[mL/s],time[ms]\n1,500,1000\n" +
		"pressure[mmHg],flow[L/min],time[s]\n1,60,2\n"
	var g got
	d, _ := NewTextDecoder(DecoderOptions{}, g.emit)
	_ = Decode(strings.NewReader(text), d)
	want := []Sample{
		{TimeS: 0, PressureCmH2O: 10.19716, FlowLPS: 1},   // 1 hPa = 1.019716 cmH2O (exact, from the SI definitions)
		{TimeS: 1, PressureCmH2O: 10.19716, FlowLPS: 0.5}, // 1 kPa = 10.19716 cmH2O (exact, from the SI definitions)
		{TimeS: 2, PressureCmH2O: 1.35951, FlowLPS: 1},    // 1 mmHg = 1.35951 cmH2O (exact, from the SI definitions)
	}
	if len(g.samples) != len(want) {
		t.Fatalf("got %d samples (%+v, %v)", len(g.samples), d.Stats(), d.Err())
	}
	for i, w := range want {
		s := g.samples[i]
		// The reference gives seven significant digits.
		if s.TimeS != w.TimeS || math.Abs(s.PressureCmH2O/w.PressureCmH2O-1) > 5e-7 || s.FlowLPS != w.FlowLPS {
			t.Errorf("line %d: %+v, want %+v", i, s, w)
		}
	}
}

// TestTextRejects feeds lines that must be counted as bad and skipped.
func TestTextRejects(t *testing.T) {
	tests := []struct {
		name string
		line string
		bad  uint64
	}{
		{"letters", "0.0,abc,1.0", 1},
		{"nan", "0.0,NaN,1.0", 1},
		{"inf", "0.0,5,+Inf", 1},
		{"overflow", "0.0,1e400,1", 1},
		{"too few fields", "0.0,5", 1},
		{"empty field", "0.0,,5", 1},
		{"two dots", "0.0,5..0,1", 1},
		{"bare sign", "0.0,-,1", 1},
		{"bare exponent", "0.0,5e,1", 1},
		{"over 1 KiB", "0.0,5," + strings.Repeat("1", MaxLineBytes), 1},
		{"comment", "# bench 3, PEEP 5", 0},
		{"blank", "   ", 0},
		{"extra fields ignored", "0.0,5,1,7,8", 0},
		{"spaces around fields", " 0.0 , 5 ,\t1 ", 0},
		{"blank inside a number", "0.0,5 1,1", 1},
		{"letter after a number", "0.0,5x,1", 1},
		{"sign after a number", "0.0,5-,1", 1},
		{"blank field", "0.0, ,1", 1},
		{"last field empty", "0.0,5,", 1},
		{"last field blank then comma", "0.0,5,1 ,", 0},
		{"exponent then blank", "0.0,5e1 ,1", 0},
		{"exponent then letter", "0.0,5e1x,1", 1},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var g got
			d, _ := NewTextDecoder(DecoderOptions{}, g.emit)
			_, _ = d.Write([]byte("0,1,2\n" + tc.line + "\n1,1,2\n"))
			d.Flush()
			st := d.Stats()
			if st.BadLines != tc.bad || int(st.Samples) != len(g.samples) || len(g.samples) != 3-int(tc.bad)-boolInt(tc.line == "   " || tc.line[0] == '#') {
				t.Fatalf("stats %+v, %d samples", st, len(g.samples))
			}
			if g.samples[len(g.samples)-1].TimeS != 1 {
				t.Fatalf("line after the bad one lost: %+v", g.samples)
			}
		})
	}
}

func boolInt(b bool) int {
	if b {
		return 1
	}
	return 0
}

func TestTextHeaderErrors(t *testing.T) {
	tests := []struct {
		name, input string
		samples     int
		errText     string
	}{
		{"unknown unit", "time[s],pressure[psi],flow[L/min]\n0,1,2\n", 0, `pressure unit "psi"`},
		{"no rate", "pressure[hPa],flow[L/s]\n1,2\n", 0, "no declared sample rate"},
		{"recovered by a later header", "time[s],pressure[psi],flow[L/min]\n0,1,2\ntime[s],pressure[hPa],flow[L/s]\n0,1,2\n", 1, ""},
		{"twice", "time[s],time[ms],pressure,flow\n", 0, "given twice"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var g got
			d, _ := NewTextDecoder(DecoderOptions{}, g.emit)
			_ = Decode(strings.NewReader(tc.input), d)
			if len(g.samples) != tc.samples {
				t.Fatalf("%d samples, want %d", len(g.samples), tc.samples)
			}
			if tc.errText == "" && d.Err() != nil || tc.errText != "" && (d.Err() == nil || !strings.Contains(d.Err().Error(), tc.errText)) {
				t.Fatalf("err %v, want %q", d.Err(), tc.errText)
			}
		})
	}
	if _, err := NewTextDecoder(DecoderOptions{Columns: "time[s],pressure[cmH2O]"}, nil); err == nil {
		t.Error("columns without flow accepted")
	}
}

// TestParseNumber checks the fast path against strconv.ParseFloat, the
// standard library's correctly rounded conversion.
func TestParseNumber(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	cases := []string{"0", "-0", "1", "+1.5", "0.1", "123456789012345678", "1234567890123456789012",
		"9007199254740993", "1e22", "1e23", "4.9e-324", "1.7976931348623157e308", "0.000000000000000000001",
		".5", "5.", "-.25e+2", "000012.5000"}
	for range 2000 {
		v := (r.Float64() - 0.5) * math.Pow(10, float64(r.IntN(12)-6))
		cases = append(cases, strconv.FormatFloat(v, 'g', -1, 64), strconv.FormatFloat(v, 'f', r.IntN(8), 64))
	}
	for _, c := range cases {
		want, err := strconv.ParseFloat(c, 64)
		got, ok := parseNumber([]byte(c))
		if !ok || err != nil || got != want {
			t.Errorf("parseNumber(%q) = %v, %v; strconv %v, %v", c, got, ok, want, err)
		}
	}
	for _, c := range []string{"", "-", ".", "e5", "1e", "1e+", "0x10", "inf", "NaN", "1,5", "1 5", "--1", "1.2.3"} {
		if v, ok := parseNumber([]byte(c)); ok {
			t.Errorf("parseNumber(%q) = %v, accepted", c, v)
		}
	}
}

func TestBinaryRoundTrip(t *testing.T) {
	in := testSignal(1000, 250, true)
	in[3].VolumeL = NoVolume
	tests := []struct {
		name  string
		opts  BinaryEncoderOptions
		batch int
	}{
		{"counter timing, one sample per frame", BinaryEncoderOptions{RateHz: 250}, 1},
		{"counter timing, volume, 50 per frame", BinaryEncoderOptions{RateHz: 250, Volume: true}, 50},
		{"device time, 255 per frame", BinaryEncoderOptions{RateHz: 250, Time: true, Volume: true}, 400},
		{"device time without rate", BinaryEncoderOptions{Time: true}, 3},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			enc, err := NewBinaryEncoder(tc.opts)
			if err != nil {
				t.Fatal(err)
			}
			var buf []byte
			for i := 0; i < len(in); i += tc.batch {
				buf = enc.AppendFrame(buf, "bench-a", in[i:min(i+tc.batch, len(in))])
			}
			var g got
			d, _ := NewBinaryDecoder(DecoderOptions{}, g.emit)
			// Feed in odd-sized pieces to exercise the carry-over.
			for p := buf; len(p) > 0; {
				k := min(len(p), 1+len(p)%97)
				_, _ = d.Write(p[:k])
				p = p[k:]
			}
			d.Flush()
			if st := d.Stats(); st != (DecoderStats{Samples: uint64(len(in))}) {
				t.Fatalf("stats %+v", st)
			}
			for i, s := range g.samples {
				w := in[i]
				if !tc.opts.Volume {
					w.VolumeL = NoVolume
				}
				// Fixed point: 0.001 cmH2O, 0.01 mL/s, 1 µL, 1 µs (DefaultScale),
				// so half of each step is the largest error.
				if g.streams[i] != "bench-a" || !near(s.TimeS, w.TimeS, 1e-9) || !near(s.PressureCmH2O, w.PressureCmH2O, 0.0005) ||
					!near(s.FlowLPS, w.FlowLPS, 0.5e-5) || !near(s.VolumeL, w.VolumeL, 0.5e-6) {
					t.Fatalf("sample %d: %+v, want %+v", i, s, w)
				}
			}
		})
	}
}

// TestBinaryExactFixedPoint checks that raw values decode to the decimal
// value they denote, as strconv reads the same decimal text.
func TestBinaryExactFixedPoint(t *testing.T) {
	enc, _ := NewBinaryEncoder(BinaryEncoderOptions{RateHz: 100})
	var g got
	d, _ := NewBinaryDecoder(DecoderOptions{}, g.emit)
	_, _ = d.Write(enc.Append(nil, "x", Sample{PressureCmH2O: 12.345, FlowLPS: -0.12345}))
	want, _ := strconv.ParseFloat("12.345", 64)
	wantF, _ := strconv.ParseFloat("-0.12345", 64)
	if len(g.samples) != 1 || g.samples[0].PressureCmH2O != want || g.samples[0].FlowLPS != wantF {
		t.Fatalf("got %+v", g.samples)
	}
}

// frames returns a binary stream of n single-sample frames of two streams
// and the frame boundaries.
func frames(t testing.TB, n int) ([][]byte, []Sample) {
	enc, err := NewBinaryEncoder(BinaryEncoderOptions{RateHz: 100, Volume: true})
	if err != nil {
		t.Fatal(err)
	}
	in := testSignal(n, 100, true)
	out := make([][]byte, n)
	for i, s := range in {
		out[i] = enc.Append(nil, "bed7", s)
	}
	return out, in
}

// corruptBinary builds a binary stream of n single-sample frames of which 5 %
// have one byte flipped (anywhere, sync included) and 2.5 % are preceded by
// garbage (sometimes sync-like). It returns the stream, the samples of the
// intact frames, and the exact counters a decoder must end with: one bad
// frame per maximal corrupt stretch, every corrupt byte skipped.
func corruptBinary(t testing.TB, n int, seed uint64) (stream []byte, want []Sample, badRuns, skipped uint64) {
	fr, in := frames(t, n)
	r := rand.New(rand.NewPCG(seed, seed))
	inRun := false
	for i, f := range fr {
		switch x := r.Float64(); {
		case x < 0.05:
			c := append([]byte(nil), f...)
			c[r.IntN(len(c))] ^= byte(1 + r.IntN(255))
			stream = append(stream, c...)
			skipped += uint64(len(c))
			if !inRun {
				badRuns++
			}
			inRun = true
			continue
		case x < 0.075:
			g := make([]byte, 1+r.IntN(40))
			for k := range g {
				g[k] = byte(r.IntN(256))
			}
			if r.IntN(2) == 0 {
				g = append(g, frameSync0, frameSync1, frameVersion)
			}
			stream = append(stream, g...)
			skipped += uint64(len(g))
			if !inRun {
				badRuns++
			}
		}
		inRun = false
		stream = append(stream, f...)
		want = append(want, in[i])
	}
	return stream, want, badRuns, skipped
}

// TestBinaryCorruption decodes a corrupted stream: every intact frame must
// decode, and the counters must match the damage exactly.
func TestBinaryCorruption(t *testing.T) {
	stream, want, badRuns, skipped := corruptBinary(t, 4000, 7)
	r := rand.New(rand.NewPCG(8, 8))
	var g got
	d, _ := NewBinaryDecoder(DecoderOptions{}, g.emit)
	for p := stream; len(p) > 0; {
		k := min(len(p), 1+r.IntN(300))
		_, _ = d.Write(p[:k])
		p = p[k:]
	}
	d.Flush()
	st := d.Stats()
	if st.Samples != uint64(len(want)) || st.BadFrames != badRuns || st.SkippedBytes != skipped {
		t.Fatalf("stats %+v; want %d samples, %d bad frames, %d skipped bytes", st, len(want), badRuns, skipped)
	}
	for i := range want {
		if g.samples[i].PressureCmH2O != round3(want[i].PressureCmH2O) {
			t.Fatalf("sample %d: %+v, want %+v", i, g.samples[i], want[i])
		}
	}
	t.Logf("4000 frames, %d corrupt stretches, %d bytes skipped", badRuns, skipped)
}

func round3(v float64) float64 { return math.Round(v*1000) / 1000 }

// corruptText builds text lines of which 5 % have a byte of a numeric field
// replaced by a byte no number contains, and returns the input, the samples
// of the intact lines and the exact number of bad lines.
func corruptText(t testing.TB, n int, seed uint64) (stream []byte, want []Sample, bad uint64) {
	enc, _ := NewTextEncoder(TextEncoderOptions{Stream: true, Volume: true})
	in := testSignal(n, 100, true)
	r := rand.New(rand.NewPCG(seed, seed+1))
	stream = append(stream, enc.Header()...)
	junk := []byte("x\x00\xff;:?!Z")
	for _, s := range in {
		line := enc.Append(nil, "bed7", s)
		if r.Float64() < 0.05 {
			start := bytes.IndexByte(line, ',') + 1
			k := start + r.IntN(len(line)-1-start)
			for line[k] == ',' {
				k = start + r.IntN(len(line)-1-start)
			}
			line[k] = junk[r.IntN(len(junk))]
			bad++
		} else {
			want = append(want, s)
		}
		stream = append(stream, line...)
	}
	return stream, want, bad
}

// TestTextCorruption checks that every intact line arrives and the count of
// bad lines is exact.
func TestTextCorruption(t *testing.T) {
	stream, want, bad := corruptText(t, 4000, 3)
	r := rand.New(rand.NewPCG(5, 5))
	var g got
	d, _ := NewTextDecoder(DecoderOptions{}, g.emit)
	for p := stream; len(p) > 0; {
		k := min(len(p), 1+r.IntN(200))
		_, _ = d.Write(p[:k])
		p = p[k:]
	}
	d.Flush()
	st := d.Stats()
	if st.Samples != uint64(len(want)) || st.BadLines != bad {
		t.Fatalf("stats %+v; want %d samples, %d bad lines", st, len(want), bad)
	}
	for i := range want {
		if g.samples[i].TimeS != want[i].TimeS || g.samples[i].PressureCmH2O != want[i].PressureCmH2O {
			t.Fatalf("sample %d: %+v, want %+v", i, g.samples[i], want[i])
		}
	}
}

// TestPiecewiseEqualsWhole feeds the same input whole and one byte at a time.
func TestPiecewiseEqualsWhole(t *testing.T) {
	tenc, _ := NewTextEncoder(TextEncoderOptions{CRLF: true, Stream: true})
	benc, _ := NewBinaryEncoder(BinaryEncoderOptions{RateHz: 50})
	tb, bb := append([]byte("# a comment\r\n"), tenc.Header()...), []byte{1, 2, frameSync0}
	for i, s := range testSignal(200, 50, false) {
		tb = tenc.Append(tb, fmt.Sprint("s", i%3), s)
		bb = benc.Append(bb, fmt.Sprint("s", i%3), s)
	}
	tb = append(tb, "junk\n0,1"...)
	for _, f := range []Format{FormatText, FormatBinary} {
		t.Run(string(f), func(t *testing.T) {
			in := tb
			if f == FormatBinary {
				in = bb
			}
			var whole, piece got
			dw, _ := NewDecoder(f, DecoderOptions{}, whole.emit)
			dp, _ := NewDecoder(f, DecoderOptions{}, piece.emit)
			_, _ = dw.Write(in)
			dw.Flush()
			for i := range in {
				_, _ = dp.Write(in[i : i+1])
			}
			dp.Flush()
			if dw.Stats() != dp.Stats() || len(whole.samples) != len(piece.samples) || len(whole.samples) < 200 {
				t.Fatalf("whole %+v, piecewise %+v", dw.Stats(), dp.Stats())
			}
			for i := range whole.samples {
				if whole.samples[i] != piece.samples[i] && !math.IsNaN(whole.samples[i].VolumeL) || whole.streams[i] != piece.streams[i] {
					t.Fatalf("sample %d differs", i)
				}
			}
		})
	}
}

func TestDecodeAllocations(t *testing.T) {
	tenc, _ := NewTextEncoder(TextEncoderOptions{Stream: true, Volume: true})
	benc, _ := NewBinaryEncoder(BinaryEncoderOptions{RateHz: 100, Volume: true})
	var tb, bb []byte
	for i, s := range testSignal(100, 100, true) {
		tb = tenc.Append(tb, fmt.Sprint("s", i%3), s)
		bb = benc.Append(bb, fmt.Sprint("s", i%3), s)
	}
	td, _ := NewTextDecoder(DecoderOptions{}, nil)
	bd, _ := NewBinaryDecoder(DecoderOptions{}, nil)
	_, _ = td.Write(tenc.Header()) // learn the layout and the stream ids
	_, _ = td.Write(tb)
	_, _ = bd.Write(bb)
	if a := testing.AllocsPerRun(50, func() { _, _ = td.Write(tb) }); a != 0 {
		t.Errorf("text decoder: %v allocations per 100 samples", a)
	}
	if a := testing.AllocsPerRun(50, func() { _, _ = bd.Write(bb) }); a != 0 {
		t.Errorf("binary decoder: %v allocations per 100 samples", a)
	}
}
