package record

import (
	"context"
	"os"
	"path/filepath"
	"testing"
	"time"

	"trapline/ingest"
)

// TestTapOfALiveSource records a file source through ingest.Options.Tap and
// reads back the samples the source delivered, in both wire formats.
func TestTapOfALiveSource(t *testing.T) {
	textEnc, _ := ingest.NewTextEncoder(ingest.TextEncoderOptions{})
	binEnc, _ := ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: 100})
	for _, tc := range []struct {
		format ingest.Format
		enc    ingest.Encoder
	}{{ingest.FormatText, textEnc}, {ingest.FormatBinary, binEnc}} {
		t.Run(string(tc.format), func(t *testing.T) {
			dir := t.TempDir()
			in := filepath.Join(dir, "in.dat")
			b := append([]byte(nil), tc.enc.Header()...)
			for _, s := range wave(2000, 0) {
				b = tc.enc.Append(b, "", s)
			}
			if err := os.WriteFile(in, b, 0o600); err != nil {
				t.Fatal(err)
			}
			w := openWriter(t, Options{Dir: filepath.Join(dir, "rec")})
			src, err := ingest.Open("file://"+in, ingest.Options{Stream: "bed-7", Format: tc.format, RateHz: 100, Tap: w.Tap})
			if err != nil {
				t.Fatal(err)
			}
			var live []ingest.Sample
			ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
			defer cancel()
			_ = src.Run(ctx, func(ev ingest.Event) { live = append(live, ev.Samples...) })
			if err := w.Close(); err != nil {
				t.Fatal(err)
			}
			r, err := OpenReader(filepath.Join(dir, "rec"))
			if err != nil {
				t.Fatal(err)
			}
			var got []ingest.Sample
			_, err = r.Samples(context.Background(), Filter{Stream: "bed-7"}, nil, func(stream string, s ingest.Sample) {
				if stream != "bed-7" {
					t.Errorf("sample of stream %q", stream)
				}
				got = append(got, s)
			})
			if err != nil {
				t.Fatal(err)
			}
			if len(live) != 2000 || !sameSamples(got, live) {
				t.Errorf("replayed %d samples, the source delivered %d: want the same", len(got), len(live))
			}
		})
	}
}
