package alerts

import (
	"context"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"
)

// TestPublisherCollector delivers three events and refuses one, then reads
// the counters through a Prometheus registry.
func TestPublisherCollector(t *testing.T) {
	_, nc, cfg := startWithStreams(t)
	p := newTestPublisher(t, nc, t.TempDir(), PublisherOptions{Streams: cfg})
	reg := prometheus.NewPedanticRegistry()
	if err := reg.Register(p.Collector("trapline")); err != nil {
		t.Fatal(err)
	}
	stop := runPublisher(t, p)
	for i := range 3 {
		if err := p.Publish(context.Background(), testEvent("bed-m", i, Raised)); err != nil {
			t.Fatal(err)
		}
	}
	bad := testEvent("bed-m", 9, Raised)
	bad.Priority = "urgent"
	if err := p.Publish(context.Background(), bad); err == nil {
		t.Fatal("invalid event accepted")
	}
	waitFor(t, 10*time.Second, "spool to drain", func() bool { return p.Depth() == 0 })
	stop()
	_ = p.Close()
	mfs, err := reg.Gather()
	if err != nil {
		t.Fatal(err)
	}
	got := map[string]float64{}
	for _, mf := range mfs {
		if mf.GetType() != dto.MetricType_COUNTER || len(mf.GetMetric()) != 1 {
			t.Errorf("%s: type %v with %d series, want one counter", mf.GetName(), mf.GetType(), len(mf.GetMetric()))
			continue
		}
		got[mf.GetName()] = mf.GetMetric()[0].GetCounter().GetValue()
	}
	for name, want := range map[string]float64{
		"trapline_alert_publish_acked_total":              3,
		"trapline_alert_publish_duplicates_total":         0,
		"trapline_alert_publish_found_total":              0,
		"trapline_alert_publish_retries_total":            0,
		"trapline_alert_publish_refused_total":            1,
		"trapline_alert_spool_corrupt_total":              0,
		"trapline_alert_spool_evicted_total":              0,
		"trapline_alert_publish_foreign_duplicates_total": 0,
	} {
		if v, ok := got[name]; !ok || v != want {
			t.Errorf("%s = %v (present %v), want %v", name, v, ok, want)
		}
	}
	if len(got) != 8 {
		t.Errorf("%d metrics, want 8", len(got))
	}
}
