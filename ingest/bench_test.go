package ingest

import (
	"testing"
)

// benchInput encodes n samples of the test signal.
func benchInput(b *testing.B, enc Encoder, n, batch int) []byte {
	b.Helper()
	in := testSignal(n, 500, false)
	var buf []byte
	if be, ok := enc.(*BinaryEncoder); ok && batch > 1 {
		for i := 0; i < n; i += batch {
			buf = be.AppendFrame(buf, "bed-12", in[i:min(i+batch, n)])
		}
		return buf
	}
	for _, s := range in {
		buf = enc.Append(buf, "bed-12", s)
	}
	return buf
}

// benchDecode decodes input (n samples) b.N times, 16 KiB at a time as a
// source does, and reports samples per second. The header goes in first,
// once, as on a real link.
func benchDecode(b *testing.B, d Decoder, header, input []byte, n int) {
	_, _ = d.Write(header)
	b.SetBytes(int64(len(input)))
	b.ReportAllocs()
	cpu0 := processCPU()
	for b.Loop() {
		for p := input; len(p) > 0; {
			k := min(len(p), 16<<10)
			_, _ = d.Write(p[:k])
			p = p[k:]
		}
	}
	if d.Stats().BadLines+d.Stats().BadFrames != 0 {
		b.Fatalf("bad input: %+v", d.Stats())
	}
	b.ReportMetric(float64(n)*float64(b.N)/b.Elapsed().Seconds(), "samples/s")
	if cpu := processCPU() - cpu0; cpu > 0 {
		b.ReportMetric(float64(cpu.Nanoseconds())/(float64(n)*float64(b.N)), "cpu-ns/sample")
	}
}

func BenchmarkTextDecode(b *testing.B) {
	const n = 10000
	for _, tc := range []struct {
		name string
		opts TextEncoderOptions
	}{
		{"3 decimals", TextEncoderOptions{Decimals: 3}},
		{"stream column 3 decimals", TextEncoderOptions{Decimals: 3, Stream: true}},
		{"shortest float64", TextEncoderOptions{}},
	} {
		b.Run(tc.name, func(b *testing.B) {
			enc, _ := NewTextEncoder(tc.opts)
			in := benchInput(b, enc, n, 1)
			var sum float64
			d, _ := NewTextDecoder(DecoderOptions{}, func(_ string, s Sample) { sum += s.FlowLPS })
			benchDecode(b, d, enc.Header(), in, n)
		})
	}
}

func BenchmarkBinaryDecode(b *testing.B) {
	const n = 10000
	for _, tc := range []struct {
		name  string
		opts  BinaryEncoderOptions
		batch int
	}{
		{"1 sample per frame", BinaryEncoderOptions{RateHz: 500}, 1},
		{"10 samples per frame", BinaryEncoderOptions{RateHz: 500}, 10},
		{"50 samples per frame with time and volume", BinaryEncoderOptions{RateHz: 500, Time: true, Volume: true}, 50},
	} {
		b.Run(tc.name, func(b *testing.B) {
			enc, _ := NewBinaryEncoder(tc.opts)
			in := benchInput(b, enc, n, tc.batch)
			var sum float64
			d, _ := NewBinaryDecoder(DecoderOptions{}, func(_ string, s Sample) { sum += s.FlowLPS })
			benchDecode(b, d, enc.Header(), in, n)
		})
	}
}

func BenchmarkTextEncode(b *testing.B) {
	enc, _ := NewTextEncoder(TextEncoderOptions{Decimals: 3})
	in := testSignal(1000, 500, false)
	buf := make([]byte, 0, 64<<10)
	b.ReportAllocs()
	for b.Loop() {
		buf = buf[:0]
		for _, s := range in {
			buf = enc.Append(buf, "", s)
		}
	}
	b.ReportMetric(1000*float64(b.N)/b.Elapsed().Seconds(), "samples/s")
}
