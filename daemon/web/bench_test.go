package web

import (
	"fmt"
	"testing"
)

// BenchmarkHubSamples is the cost to an analysis goroutine of handing the
// hub a batch of 10 samples (100 Hz, thinned to 50 Hz).
func BenchmarkHubSamples(b *testing.B) {
	h := NewHub(HubConfig{})
	ss := samples(0, 10, 100)
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		for j := range ss {
			ss[j].TimeS = float64(i*10+j) / 100
		}
		h.Samples("bed-1", ss)
	}
}

// BenchmarkFrame200 is one frame of the hub with 200 streams that each got
// 0.1 s of samples since the last one, for one page showing one stream.
func BenchmarkFrame200(b *testing.B) {
	h := NewHub(HubConfig{ClientQueue: 1 << 20})
	c, err := h.register("bed-001")
	if err != nil {
		b.Fatal(err)
	}
	ids := make([]string, 200)
	for i := range ids {
		ids[i] = fmt.Sprintf("bed-%03d", i+1)
	}
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		for _, id := range ids {
			h.Samples(id, samples(float64(i)/10, 10, 100))
		}
		h.frame()
		<-c.q
	}
}
