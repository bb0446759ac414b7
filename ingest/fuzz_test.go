package ingest

import (
	"bytes"
	"encoding/binary"
	"encoding/hex"
	"hash/crc32"
	"math"
	"os"
	"path/filepath"
	"testing"
)

// seeds adds every file of a testdata folder to a fuzz corpus.
func seeds(f *testing.F, dir string) {
	f.Helper()
	files, err := filepath.Glob(filepath.Join("testdata", dir, "*"))
	if err != nil || len(files) == 0 {
		f.Fatalf("no seeds in testdata/%s: %v", dir, err)
	}
	for _, name := range files {
		b, err := os.ReadFile(name)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b, uint16(len(b)/2))
	}
}

// checkDecoder decodes input whole and split at cut, and checks what must
// hold for any input: no panic, the same result both ways, finite samples,
// valid stream ids, and counters that add up.
func checkDecoder(t *testing.T, format Format, opts DecoderOptions, input []byte, cut int) {
	var whole, split got
	dw, err := NewDecoder(format, opts, whole.emit)
	if err != nil {
		t.Fatal(err)
	}
	ds, _ := NewDecoder(format, opts, split.emit)
	_, _ = dw.Write(input)
	dw.Flush()
	cut = min(cut, len(input))
	_, _ = ds.Write(input[:cut])
	_, _ = ds.Write(input[cut:])
	ds.Flush()
	if dw.Stats() != ds.Stats() || len(whole.samples) != len(split.samples) {
		t.Fatalf("whole %+v, split at %d %+v", dw.Stats(), cut, ds.Stats())
	}
	if format == FormatText {
		// The general path alone (one byte at a time, so never the fast
		// lane) gives the same samples and counters.
		if ref, st := decodeBytewise(opts, input); st != dw.Stats() || !sameSamples(ref, whole) {
			t.Fatalf("whole %+v, byte by byte %+v", dw.Stats(), st)
		}
		// So does the fast lane handing its samples on in runs.
		var inRuns got
		ro := opts
		ro.Runs = func(stream string, ss []Sample) {
			for _, s := range ss {
				inRuns.emit(stream, s)
			}
		}
		dr, _ := NewDecoder(format, ro, inRuns.emit)
		_, _ = dr.Write(input[:cut])
		_, _ = dr.Write(input[cut:])
		dr.Flush()
		if dr.Stats() != dw.Stats() || !sameSamples(inRuns, whole) {
			t.Fatalf("whole %+v, in runs %+v", dw.Stats(), dr.Stats())
		}
	}
	st := dw.Stats()
	if st.Samples != uint64(len(whole.samples)) {
		t.Fatalf("stats count %d samples, emitted %d", st.Samples, len(whole.samples))
	}
	if format == FormatBinary && st.SkippedBytes > uint64(len(input)) {
		t.Fatalf("skipped %d of %d bytes", st.SkippedBytes, len(input))
	}
	if format == FormatText && st.BadLines > uint64(bytes.Count(input, []byte{'\n'})+1) {
		t.Fatalf("%d bad lines in %d lines", st.BadLines, bytes.Count(input, []byte{'\n'})+1)
	}
	for i, s := range whole.samples {
		if s != split.samples[i] && !math.IsNaN(s.VolumeL) || whole.streams[i] != split.streams[i] {
			t.Fatalf("sample %d differs: %+v vs %+v", i, s, split.samples[i])
		}
		if math.IsNaN(s.TimeS) || math.IsInf(s.TimeS, 0) || math.IsNaN(s.PressureCmH2O) || math.IsInf(s.PressureCmH2O, 0) ||
			math.IsNaN(s.FlowLPS) || math.IsInf(s.FlowLPS, 0) || math.IsInf(s.VolumeL, 0) {
			t.Fatalf("sample %d not finite: %+v", i, s)
		}
		if !ValidStreamID(whole.streams[i]) {
			t.Fatalf("sample %d: stream id %q", i, whole.streams[i])
		}
	}
}

func FuzzTextDecoder(f *testing.F) {
	seeds(f, "text")
	f.Fuzz(func(t *testing.T, input []byte, cut uint16) {
		checkDecoder(t, FormatText, DecoderOptions{RateHz: 100, Stream: "bed-3"}, input, int(cut))
	})
}

func FuzzBinaryDecoder(f *testing.F) {
	seeds(f, "binary")
	f.Fuzz(func(t *testing.T, input []byte, cut uint16) {
		if cut&1 == 1 {
			// Give every candidate frame a correct CRC, so that the fuzzer
			// reaches the checks and conversions behind it.
			input = fixCRCs(input)
		}
		checkDecoder(t, FormatBinary, DecoderOptions{RateHz: 100}, input, int(cut))
	})
}

// fixCRCs returns a copy of b in which every sync followed by a valid header
// and enough bytes ends with the CRC-32C of its frame.
func fixCRCs(b []byte) []byte {
	b = append([]byte(nil), b...)
	for i := 0; i+frameHeaderLen <= len(b); i++ {
		if b[i] != frameSync0 {
			continue
		}
		n, ok := frameSize(b[i:])
		if !ok || i+n > len(b) {
			continue
		}
		binary.LittleEndian.PutUint32(b[i+n-4:], crc32.Checksum(b[i+2:i+n-4], castagnoli))
	}
	return b
}

// TestWriteBinarySeeds rewrites testdata/binary when TRAPLINE_UPDATE_TESTDATA
// is set; otherwise it checks that the files still decode as documented, so
// a change of the framing cannot go unnoticed.
func TestWriteBinarySeeds(t *testing.T) {
	in := testSignal(40, 100, true)
	in[5].VolumeL = NoVolume
	mk := func(opts BinaryEncoderOptions, batch int, stream string) []byte {
		enc, err := NewBinaryEncoder(opts)
		if err != nil {
			t.Fatal(err)
		}
		var b []byte
		for i := 0; i < len(in); i += batch {
			b = enc.AppendFrame(b, stream, in[i:min(i+batch, len(in))])
		}
		return b
	}
	files := map[string]struct {
		data             []byte
		samples, badRuns uint64
		skipped          uint64
	}{
		"single.bin":         {mk(BinaryEncoderOptions{RateHz: 100}, 1, "bed-1"), 40, 0, 0},
		"batched.bin":        {mk(BinaryEncoderOptions{RateHz: 100, Time: true, Volume: true}, 8, "bench-a"), 40, 0, 0},
		"default-stream.bin": {mk(BinaryEncoderOptions{RateHz: 100, Volume: true}, 20, ""), 40, 0, 0},
	}
	good := mk(BinaryEncoderOptions{RateHz: 100}, 4, "bed-2")
	frameLen := len(good) / 10
	bad := append([]byte{0x00, 0xA5, 0x7E, 0x01}, good...)
	bad[4+frameLen+7] ^= 0x40 // a flipped bit in the second frame
	files["corrupt.bin"] = struct {
		data             []byte
		samples, badRuns uint64
		skipped          uint64
	}{bad, 36, 2, uint64(4 + frameLen)}
	for name, want := range files {
		path := filepath.Join("testdata", "binary", name)
		if os.Getenv("TRAPLINE_UPDATE_TESTDATA") != "" {
			if err := os.WriteFile(path, want.data, 0o644); err != nil {
				t.Fatal(err)
			}
		}
		b, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		d, _ := NewBinaryDecoder(DecoderOptions{}, nil)
		_ = Decode(bytes.NewReader(b), d)
		if st := d.Stats(); st.Samples != want.samples || st.BadFrames != want.badRuns || st.SkippedBytes != want.skipped {
			t.Errorf("%s: %+v, want %d samples, %d bad, %d skipped", name, st, want.samples, want.badRuns, want.skipped)
		}
	}
}

// TestTestdataText decodes the example files; their expected counts can be
// checked by reading them.
func TestTestdataText(t *testing.T) {
	tests := []struct {
		file          string
		samples, bad  uint64
		firstPressure float64
	}{
		{"bench-basic.csv", 30, 0, 15},
		{"headerless.csv", 20, 0, 15},
		{"multi-stream-crlf.csv", 20, 0, 15},
		{"units-kpa-mls.csv", 20, 0, 15},
		// x, NaN, a missing field, 1e999, a 1,100-digit field, the header
		// with the unknown unit psi and the line after it; three good lines.
		{"corrupt.csv", 3, 7, 5},
	}
	for _, tc := range tests {
		t.Run(tc.file, func(t *testing.T) {
			b, err := os.ReadFile(filepath.Join("testdata", "text", tc.file))
			if err != nil {
				t.Fatal(err)
			}
			var g got
			d, _ := NewTextDecoder(DecoderOptions{RateHz: 100}, g.emit)
			_ = Decode(bytes.NewReader(b), d)
			if st := d.Stats(); st.Samples != tc.samples || st.BadLines != tc.bad {
				t.Fatalf("%+v, want %d samples and %d bad lines", st, tc.samples, tc.bad)
			}
			// The files were written with 2 to 5 decimals of cmH2O, hPa or kPa.
			if math.Abs(g.samples[0].PressureCmH2O-tc.firstPressure) > 1e-3 {
				t.Fatalf("first pressure %v, want %v", g.samples[0].PressureCmH2O, tc.firstPressure)
			}
		})
	}
}

// TestFramingExample checks the frame printed byte by byte in
// docs/framing.md, and the CRC-32C check value of the Castagnoli polynomial
// for "123456789", 0xE3069283 (Castagnoli G., Bräuer S., Herrmann M.,
// "Optimization of cyclic redundancy-check codes with 24 and 32 parity
// bits", IEEE Trans. Commun. 1993; check value as listed for CRC-32C in
// RFC 3720, iSCSI, 2004).
func TestFramingExample(t *testing.T) {
	if got := crc32.Checksum([]byte("123456789"), castagnoli); got != 0xE3069283 {
		t.Fatalf("CRC-32C check value %#x", got)
	}
	enc, _ := NewBinaryEncoder(BinaryEncoderOptions{RateHz: 100})
	_ = enc.Append(nil, "bed-1", Sample{PressureCmH2O: 5, FlowLPS: 0.25})
	got := enc.Append(nil, "bed-1", Sample{TimeS: 0.01, PressureCmH2O: 5.123, FlowLPS: -0.5})
	want, _ := hex.DecodeString("a57e" + "01" + "00" + "05" + "01" + "01000000" + "a0860100" + "fdfbfafa" +
		"6265642d31" + "03140000" + "b03cffff" + "a01062ef")
	if !bytes.Equal(got, want) {
		t.Fatalf("frame\n%x\nwant\n%x", got, want)
	}
}
