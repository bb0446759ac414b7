package daemon

import (
	"sync"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"

	"trapline/ingest"
)

// metrics holds the daemon's Prometheus metrics on a registry of its own, so
// that two daemons in one test process do not collide and /metrics shows
// only what trapline defines (plus the Go and process collectors).
//
// Counters that a source already keeps (samples read, decoder errors, gaps)
// are not double-counted: a collector reads every stream's ingest.Stats at
// scrape time. What only the daemon sees (breaths, alerts, restarts, samples
// dropped between source and analysis) is counted here directly.
type metrics struct {
	reg *prometheus.Registry

	breaths       *prometheus.CounterVec
	alerts        *prometheus.CounterVec
	queueDropped  *prometheus.CounterVec
	restarts      *prometheus.CounterVec
	streamUp      *prometheus.GaugeVec
	sourceUp      *prometheus.GaugeVec
	alertsActive  *prometheus.GaugeVec
	breathLatency prometheus.Histogram
	acks          *prometheus.CounterVec
	trustMetrics

	mu      sync.Mutex
	sources map[string]func() ingest.Stats
	// spoolDepth, natsConnected and bulletinDropped are read at scrape time.
	spoolDepth      func() int
	natsConnected   func() bool
	bulletinDropped func() uint64
}

// Metric names, listed in docs/operations.md.
const (
	metricNamespace = "trapline"
)

func newMetrics() *metrics {
	m := &metrics{
		reg:          prometheus.NewRegistry(),
		sources:      map[string]func() ingest.Stats{},
		trustMetrics: newTrustMetrics(),
		breaths: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "breaths_total",
			Help: "Completed breaths analysed, per stream.",
		}, []string{"stream"}),
		alerts: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "alerts_total",
			Help: "Alert events (state changes) handed to the durable publisher, per stream, condition and state.",
		}, []string{"stream", "condition", "state"}),
		queueDropped: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "queue_dropped_samples_total",
			Help: "Samples dropped because the analysis of a stream fell behind its source.",
		}, []string{"stream"}),
		restarts: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "stream_restarts_total",
			Help: "Times a stream's pipeline failed and was restarted by the supervisor.",
		}, []string{"stream"}),
		streamUp: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Namespace: metricNamespace, Name: "stream_up",
			Help: "1 while a stream's pipeline is running, 0 while it waits to restart.",
		}, []string{"stream"}),
		sourceUp: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Namespace: metricNamespace, Name: "source_connected",
			Help: "1 while a stream's source reports its device or connection as connected.",
		}, []string{"stream"}),
		alertsActive: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Namespace: metricNamespace, Name: "alerts_active",
			Help: "Alarm conditions raised and not yet cleared, per stream.",
		}, []string{"stream"}),
		breathLatency: prometheus.NewHistogram(prometheus.HistogramOpts{
			Namespace: metricNamespace, Name: "breath_processing_seconds",
			Help:    "Wall time from the arrival of the batch that ended a breath to the breath record being handed to the publisher.",
			Buckets: []float64{0.0001, 0.0005, 0.001, 0.005, 0.01, 0.05, 0.1, 0.5, 1},
		}),
		acks: prometheus.NewCounterVec(prometheus.CounterOpts{
			Namespace: metricNamespace, Name: "ack_requests_total",
			Help: "Acknowledgement requests received over NATS, per stream and result (ok, error).",
		}, []string{"stream", "result"}),
	}
	m.reg.MustRegister(
		collectors.NewGoCollector(),
		collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}),
		m.breaths, m.alerts, m.queueDropped, m.restarts, m.streamUp, m.sourceUp,
		m.alertsActive, m.breathLatency, m.acks,
		&scrapeCollector{m: m},
	)
	m.reg.MustRegister(m.trustMetrics.collectors()...)
	return m
}

// addSource makes a stream's source counters visible at the next scrape;
// a restarted stream replaces its old source. Counters of a replaced source
// restart from zero, which Prometheus' rate() treats as a counter reset.
func (m *metrics) addSource(stream string, stats func() ingest.Stats) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.sources[stream] = stats
}

// setDelivery tells the metrics where to read the spool depth, the NATS
// connection state and the bulletin's drop count.
func (m *metrics) setDelivery(spoolDepth func() int, connected func() bool, bulletinDropped func() uint64) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.spoolDepth, m.natsConnected, m.bulletinDropped = spoolDepth, connected, bulletinDropped
}

var (
	descSamples = prometheus.NewDesc(metricNamespace+"_samples_total",
		"Samples delivered by a stream's source.", []string{"stream"}, nil)
	descDecodeErrors = prometheus.NewDesc(metricNamespace+"_decoder_errors_total",
		"Input rejected by a stream's decoder, by kind (line: malformed text line; frame: bad binary frame).",
		[]string{"stream", "kind"}, nil)
	descDropped = prometheus.NewDesc(metricNamespace+"_source_dropped_samples_total",
		"Samples a stream's source dropped (overload, out of order).", []string{"stream"}, nil)
	descGaps = prometheus.NewDesc(metricNamespace+"_sample_gaps_total",
		"Gaps detected in a stream's time stamps or counters.", []string{"stream"}, nil)
	descSkipped = prometheus.NewDesc(metricNamespace+"_decoder_skipped_bytes_total",
		"Bytes a stream's decoder discarded while resynchronising (binary framing).", []string{"stream"}, nil)
	descReconnects = prometheus.NewDesc(metricNamespace+"_source_reconnects_total",
		"Times a stream's source reopened its device or connection.", []string{"stream"}, nil)
	descSpool = prometheus.NewDesc(metricNamespace+"_spool_depth",
		"Alert events in the local spool waiting for a JetStream acknowledgement.", nil, nil)
	descNATS = prometheus.NewDesc(metricNamespace+"_nats_connected",
		"1 while the daemon's NATS connection is up.", nil, nil)
	descBulletinDropped = prometheus.NewDesc(metricNamespace+"_bulletin_dropped_total",
		"Breath and status messages dropped because NATS was slow or away (alerts are never dropped).", nil, nil)
)

// scrapeCollector reports the values that live elsewhere (source counters,
// spool, connection) at scrape time.
type scrapeCollector struct{ m *metrics }

func (c *scrapeCollector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{descSamples, descDecodeErrors, descDropped, descGaps, descSkipped, descReconnects, descSpool, descNATS, descBulletinDropped} {
		ch <- d
	}
}

func (c *scrapeCollector) Collect(ch chan<- prometheus.Metric) {
	c.m.mu.Lock()
	sources := make(map[string]func() ingest.Stats, len(c.m.sources))
	for k, v := range c.m.sources {
		sources[k] = v
	}
	spool, conn, dropped := c.m.spoolDepth, c.m.natsConnected, c.m.bulletinDropped
	c.m.mu.Unlock()

	for stream, stats := range sources {
		s := stats()
		ch <- prometheus.MustNewConstMetric(descSamples, prometheus.CounterValue, float64(s.Samples), stream)
		ch <- prometheus.MustNewConstMetric(descDecodeErrors, prometheus.CounterValue, float64(s.BadLines), stream, "line")
		ch <- prometheus.MustNewConstMetric(descDecodeErrors, prometheus.CounterValue, float64(s.BadFrames), stream, "frame")
		ch <- prometheus.MustNewConstMetric(descDropped, prometheus.CounterValue, float64(s.Dropped+s.OutOfOrder), stream)
		ch <- prometheus.MustNewConstMetric(descGaps, prometheus.CounterValue, float64(s.Gaps), stream)
		ch <- prometheus.MustNewConstMetric(descSkipped, prometheus.CounterValue, float64(s.SkippedBytes), stream)
		ch <- prometheus.MustNewConstMetric(descReconnects, prometheus.CounterValue, float64(s.Reconnects), stream)
	}
	if spool != nil {
		ch <- prometheus.MustNewConstMetric(descSpool, prometheus.GaugeValue, float64(spool()))
	}
	if conn != nil {
		v := 0.0
		if conn() {
			v = 1
		}
		ch <- prometheus.MustNewConstMetric(descNATS, prometheus.GaugeValue, v)
	}
	if dropped != nil {
		ch <- prometheus.MustNewConstMetric(descBulletinDropped, prometheus.CounterValue, float64(dropped()))
	}
}
