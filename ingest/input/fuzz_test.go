package input_test

import (
	"bytes"
	"context"
	"testing"

	"trapline/ingest"
	"trapline/ingest/input"
)

// FuzzStdin reads arbitrary bytes as an undeclared input: detection and
// decoding must never panic, and an input that yields samples has a kind.
func FuzzStdin(f *testing.F) {
	enc, _ := ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: 100})
	f.Add(enc.Append(nil, "bed-1", ingest.Sample{PressureCmH2O: 5, FlowLPS: 0.5}))
	f.Add([]byte("time[s],pressure[cmH2O],flow[L/min]\n0,5,0\n"))
	f.Add([]byte{0x89, 'T', 'L', 'R', 'E', 'C', '\r', '\n'})
	f.Fuzz(func(t *testing.T, b []byte) {
		in, err := input.Open("-", input.Options{Stdin: bytes.NewReader(b)})
		if err != nil {
			return
		}
		st, err := in.Run(context.Background(), func(string, ingest.Sample) {})
		if err == nil && (st.Decode.Samples == 0 || (st.Kind != input.KindText && st.Kind != input.KindBinary)) {
			t.Fatalf("no error with %d samples of kind %q", st.Decode.Samples, st.Kind)
		}
	})
}
