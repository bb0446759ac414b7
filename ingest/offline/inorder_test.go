package offline

import (
	"bytes"
	"testing"

	"trapline/ingest"
)

// TestInOrder: with InOrder, one worker or none, the handlers see every
// sample in the order of the input, as a decoder's callback sees them.
func TestInOrder(t *testing.T) {
	data, _ := ward(t, ingest.FormatText, 3, 2000)
	type sample struct {
		stream string
		s      ingest.Sample
	}
	var want []sample
	dec, err := ingest.NewDecoder(ingest.FormatText, ingest.DecoderOptions{}, func(stream string, s ingest.Sample) {
		want = append(want, sample{stream, s})
	})
	if err != nil {
		t.Fatal(err)
	}
	_, _ = dec.Write(data)
	dec.Flush()
	for _, workers := range []int{0, 1} {
		var got []sample
		_, err := Run(t.Context(), bytes.NewReader(data),
			Options{Workers: workers, InOrder: true, BatchSamples: 100},
			func(stream string) Handler {
				return func(ss []ingest.Sample) {
					for _, s := range ss {
						got = append(got, sample{stream, s})
					}
				}
			})
		if err != nil {
			t.Fatal(err)
		}
		if len(want) < 6000 || len(got) != len(want) {
			t.Fatalf("%d workers: %d samples, want %d", workers, len(got), len(want))
		}
		for i := range want {
			if got[i].stream != want[i].stream || got[i].s.TimeS != want[i].s.TimeS || got[i].s.FlowLPS != want[i].s.FlowLPS {
				t.Fatalf("%d workers: sample %d is %s %v, want %s %v", workers, i, got[i].stream, got[i].s, want[i].stream, want[i].s)
			}
		}
	}
}
