package daemon

import "github.com/prometheus/client_golang/prometheus"

// trustMetrics count what the daemon does to keep its alarms trustworthy
// across restarts and faults: checkpoints that could not be written and
// alert events the durable publisher refused (analysis went on without
// them).
type trustMetrics struct {
	checkpointErrors *prometheus.CounterVec
	alertsRefused    *prometheus.CounterVec
	alertsHigh       *prometheus.CounterVec
	foreignStream    *prometheus.CounterVec
}

func newTrustMetrics() trustMetrics {
	return trustMetrics{
		checkpointErrors: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "checkpoint_errors_total",
			Help: "Stream checkpoints (alarm state for a restart) that could not be written, per stream.",
		}, []string{"stream"}),
		alertsRefused: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "alerts_refused_total",
			Help: "Alert events the durable publisher refused (spool full, disk full, oversized); analysis goes on.",
		}, []string{"stream"}),
		foreignStream: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "foreign_stream_samples_total",
			Help: "Samples refused because they carried another stream's id on a source configured for one stream.",
		}, []string{"stream"}),
		alertsHigh: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "alerts_high_priority_total",
			Help: "High-priority alert events made durable (spooled), per stream.",
		}, []string{"stream"}),
	}
}

func (t trustMetrics) collectors() []prometheus.Collector {
	return []prometheus.Collector{t.checkpointErrors, t.alertsRefused, t.alertsHigh, t.foreignStream}
}

// publisherCollector is implemented by the alert publisher.
type publisherCollector interface {
	Collector(namespace string) prometheus.Collector
}

// addPublisher puts the alert publisher's counters (acknowledged,
// duplicates, foreign duplicates, retries, refused, evicted, corrupt) on
// /metrics.
func (m *metrics) addPublisher(p publisherCollector) {
	m.reg.MustRegister(p.Collector(metricNamespace))
}
