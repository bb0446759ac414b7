package plot

import (
	"fmt"
	"io"
	"testing"
)

// hour tiles the 18-minute default scenario to a little over an hour of
// 100 Hz samples (4 × 1080 s), with its breaths and alarms.
func hour(b *testing.B) Data {
	d := scenario(b)
	out := Data{Stream: d.Stream}
	span := d.Samples[len(d.Samples)-1].TimeS + 0.01
	for k := range 4 {
		off := float64(k) * span
		for _, s := range d.Samples {
			s.TimeS += off
			out.Samples = append(out.Samples, s)
		}
		for _, br := range d.Breaths {
			br.StartS += off
			br.EndS += off
			out.Breaths = append(out.Breaths, br)
		}
		for _, ev := range d.Alerts {
			ev.TS += off
			ev.ID = fmt.Sprintf("%s-%d", ev.ID, k)
			if ev.Supersedes != "" {
				ev.Supersedes = fmt.Sprintf("%s-%d", ev.Supersedes, k)
			}
			out.Alerts = append(out.Alerts, ev)
		}
	}
	return out
}

// BenchmarkRecordingHour draws an hour of 100 Hz data (about 430 000
// samples, 1 100 breaths): the waveforms are decimated, the breath marks
// are not.
func BenchmarkRecordingHour(b *testing.B) {
	d := hour(b)
	for _, f := range Formats {
		b.Run(f, func(b *testing.B) {
			for b.Loop() {
				if err := Recording(io.Discard, f, d, Options{}); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
