package ingest

import (
	"math"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"
)

// shapeCols are the columns of the shape tests: time in s, pressure in
// cmH2O and flow in L/min, as the simulator writes them.
var shapeCols = []column{{kind: colTime, unit: unit{mul: 1}}, {kind: colPressure, unit: unit{mul: 1}},
	{kind: colFlow, unit: unit{div: 60}}}

// padded is line followed by bytes that are not part of it, so that a
// shaped read has its shapeReach bytes.
func padded(line string) []byte {
	return []byte(line + strings.Repeat("9", shapeReach))
}

// shapedOne reads one line of shape s at the start of b (shapedRun into
// one sample).
func shapedOne(b []byte, s *lineShape) (Sample, int, bool) {
	var one [1]Sample
	if shapedRun(b, s, one[:]) == 0 {
		return Sample{}, 0, false
	}
	return one[0], s.n, true
}

// checkShaped reads candidate with the shape learned from teacher and
// compares it with fastLine: a shaped read must give the same sample bit
// for bit and the same length, and must happen whenever the candidate's
// digits and other bytes sit where the teacher's do.
func checkShaped(t *testing.T, teacher, candidate string) {
	t.Helper()
	tb := padded(teacher)
	_, n, ok := fastLine(tb, shapeCols)
	if !ok {
		return
	}
	sh, ok := learnShape(tb[:n], shapeCols)
	if !ok {
		return
	}
	cb := padded(candidate)
	got, gn, gok := shapedOne(cb, &sh)
	want, wn, wok := fastLine(cb, shapeCols)
	if gok && (!wok || gn != wn || math.Float64bits(got.TimeS) != math.Float64bits(want.TimeS) ||
		math.Float64bits(got.PressureCmH2O) != math.Float64bits(want.PressureCmH2O) ||
		math.Float64bits(got.FlowLPS) != math.Float64bits(want.FlowLPS) ||
		math.Float64bits(got.VolumeL) != math.Float64bits(want.VolumeL)) {
		t.Fatalf("shape of %q read %q as %+v (%d bytes); fastLine %+v (%d bytes, %v)", teacher, candidate, got, gn,
			want, wn, wok)
	}
	if !gok && sameShape(tb[:n], cb) {
		t.Fatalf("shape of %q did not read %q, which has it", teacher, candidate)
	}
}

// sameShape reports whether b starts with a line laid out as line: digits
// where it has digits, its other bytes where it has them.
func sameShape(line, b []byte) bool {
	for i, c := range line {
		if isDigit(c) != isDigit(b[i]) || !isDigit(c) && c != b[i] {
			return false
		}
	}
	return true
}

// TestShapedLineAgainstFastLine checks shaped reads against fastLine, which
// is checked against strconv.ParseFloat (TestFastLineAgainstStrconv): for
// random lines of fastLine's form, every line with one byte changed to
// every byte value, and random lines of other shapes, read with the shape
// of the first.
func TestShapedLineAgainstFastLine(t *testing.T) {
	r := rand.New(rand.NewPCG(5, 23))
	num := func() string {
		return strconv.FormatFloat((r.Float64()-0.4)*math.Pow(10, float64(r.IntN(5))), 'f', r.IntN(5), 64)
	}
	line := func() string {
		return num() + "," + num() + "," + num() + []string{"\n", "\r\n"}[r.IntN(2)]
	}
	shaped := 0
	for range 100 {
		teacher := line()
		for i := range len(teacher) {
			for c := range 256 {
				b := []byte(teacher)
				b[i] = byte(c)
				checkShaped(t, teacher, string(b))
			}
		}
		for range 200 {
			checkShaped(t, teacher, line())
		}
		// The same shape, other digits.
		b := []byte(teacher)
		for i, c := range b {
			if isDigit(c) {
				b[i] = byte('0' + r.IntN(10))
			}
		}
		checkShaped(t, teacher, string(b))
		if sh, ok := learnShape(padded(teacher)[:len(teacher)], shapeCols); ok {
			if _, _, ok := shapedOne(padded(string(b)), &sh); ok {
				shaped++
			}
		}
	}
	if shaped < 60 {
		t.Fatalf("only %d of 100 lines of a learned shape were read by it", shaped)
	}
}

// TestTextDecoderReadsShapes checks that a sender's ordinary lines are
// read by their shapes, so that the shortcut cannot fall silently out of
// use, and that the decoder keeps at most shapeSlots of them.
func TestTextDecoderReadsShapes(t *testing.T) {
	// Bare commas, as trapline writes, and a blank after each, as many
	// programs print.
	for _, sep := range []string{",", ", "} {
		var g got
		d, _ := NewTextDecoder(DecoderOptions{}, g.emit)
		var sb strings.Builder
		sb.WriteString("time[s],pressure[cmH2O],flow[L/min]\n")
		for i := range 2000 {
			p := 5 + 20*math.Abs(math.Sin(float64(i)/40))
			f := 60 * math.Sin(float64(i)/40)
			sb.WriteString(strconv.FormatFloat(float64(i)*0.005, 'f', 4, 64) + sep +
				strconv.FormatFloat(p, 'f', 4, 64) + sep + strconv.FormatFloat(f, 'f', 4, 64) + "\n")
		}
		in := []byte(sb.String())
		_, _ = d.Write(in)
		if len(g.samples) != 2000 || d.Stats().BadLines != 0 {
			t.Fatalf("separator %q: %d samples, %+v", sep, len(g.samples), d.Stats())
		}
		if d.shapes.n < 2 || d.shapes.n > shapeSlots {
			t.Fatalf("separator %q: %d shapes held, want 2 to %d", sep, d.shapes.n, shapeSlots)
		}
		// The last lines' shape is held: the next such line is read by it.
		last := in[strings.LastIndexByte(string(in[:len(in)-1]), '\n')+1:]
		if _, _, ok := shapedOne(padded(string(last)), &d.shapes.shapes[d.shapes.last]); !ok {
			t.Fatalf("separator %q: the last line %q is not of the shape the decoder used last", sep, last)
		}
		// A header drops the shapes: they hold the columns' places.
		_, _ = d.Write([]byte("pressure[hPa],flow[L/s],time[ms]\n"))
		if d.shapes.n != 0 {
			t.Fatalf("separator %q: %d shapes held after a new header", sep, d.shapes.n)
		}
	}
}

// TestShapedRunStopsAtAnotherShape reads a run of lines: those of the
// shape, up to the first that is not, and no more than the room given.
func TestShapedRunStopsAtAnotherShape(t *testing.T) {
	in := padded("0.005,13.417,50.000\n0.010,13.500,49.875\n0.015,13.583,49.750\n0.020,9.999,49.625\n")
	_, n, _ := fastLine(in, shapeCols)
	sh, ok := learnShape(in[:n], shapeCols)
	if !ok {
		t.Fatal("no shape learned")
	}
	dst := make([]Sample, 8)
	if k := shapedRun(in, &sh, dst); k != 3 || dst[2].PressureCmH2O != 13.583 || dst[2].FlowLPS != 49.75/60 {
		t.Fatalf("read %d lines, the third %+v: want 3, the third at 13.583 cmH2O", k, dst[2])
	}
	if k := shapedRun(in, &sh, dst[:2]); k != 2 {
		t.Fatalf("read %d lines into room for 2", k)
	}
}

// FuzzShapedLine compares a shaped read with fastLine on any pair of
// lines: the first teaches the shape, the second is read with it.
func FuzzShapedLine(f *testing.F) {
	f.Add("0.0050,13.4167,50.0000\n", "0.0100,13.5000,50.0000\n")
	f.Add("1.5,-2.25,+3\r\n", "1.5,-2.25,+3\n")
	f.Add("12,0.5,-0.125\n", "12,0.5,-0.1\x00\n")
	f.Fuzz(func(t *testing.T, teacher, candidate string) { checkShaped(t, teacher, candidate) })
}

// TestFastLaneStopsAtAnInfiniteTime decodes shaped lines without a time
// column at a declared rate so small that the second sample's time is
// infinite: the fast lane stops before it, and the decoder counts what
// the general path alone counts.
func TestFastLaneStopsAtAnInfiniteTime(t *testing.T) {
	opts := DecoderOptions{Columns: "pressure,flow", RateHz: 5e-324}
	in := []byte(strings.Repeat("13.417,50.000\n", 200))
	want, wantStats := decodeBytewise(opts, in)
	for _, inRuns := range []bool{false, true} {
		g, st, _ := decodeChunked(opts, in, inRuns, func() int { return len(in) })
		if st != wantStats || !sameSamples(g, want) {
			t.Fatalf("runs %v: %+v (%d samples), general path %+v (%d samples)", inRuns, st, len(g.samples),
				wantStats, len(want.samples))
		}
	}
	if wantStats.Samples != 1 || wantStats.BadLines != 199 {
		t.Fatalf("general path %+v: want 1 sample and 199 bad lines", wantStats)
	}
}
