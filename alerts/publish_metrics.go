package alerts

import (
	"github.com/prometheus/client_golang/prometheus"
)

// publisherCollector reports a publisher's counters at scrape time, so the
// drainer never touches a metrics lock.
type publisherCollector struct {
	p                                              *Publisher
	published, duplicates, found, retries, refused *prometheus.Desc
	corrupt, evicted, foreign                      *prometheus.Desc
}

// Collector returns a Prometheus collector for the publisher's counters,
// named under namespace (e.g. "trapline"):
//
//	<ns>_alert_publish_acked_total       events JetStream stored (new)
//	<ns>_alert_publish_duplicates_total  retries JetStream recognised as already stored
//	<ns>_alert_publish_found_total       events found already stored after an uncertain publish
//	<ns>_alert_publish_retries_total     failed publish attempts, each retried
//	<ns>_alert_publish_refused_total     events refused by Publish (spool full, invalid, too large)
//	<ns>_alert_spool_corrupt_total       unreadable spool files moved aside
//	<ns>_alert_spool_evicted_total       spooled events given up for higher-ranked ones
//	<ns>_alert_publish_foreign_duplicates_total  first publishes answered "duplicate" (a forgery)
//
// The spool depth is Publisher.Depth (a gauge the daemon already exports).
func (p *Publisher) Collector(namespace string) prometheus.Collector {
	d := func(name, help string) *prometheus.Desc {
		return prometheus.NewDesc(prometheus.BuildFQName(namespace, "", name), help, nil, nil)
	}
	return &publisherCollector{
		p:          p,
		published:  d("alert_publish_acked_total", "Alert events JetStream acknowledged as newly stored."),
		duplicates: d("alert_publish_duplicates_total", "Alert publishes JetStream acknowledged as duplicates of a stored event (a retry after a lost acknowledgement)."),
		found:      d("alert_publish_found_total", "Alert events found already stored at the end of their subject after an uncertain publish."),
		retries:    d("alert_publish_retries_total", "Failed alert publish attempts; each is retried, in order."),
		refused:    d("alert_publish_refused_total", "Alert events refused before spooling (spool full, invalid or too large); each is logged as an error."),
		corrupt:    d("alert_spool_corrupt_total", "Unreadable alert spool files moved aside into corrupt/."),
		foreign:    d("alert_publish_foreign_duplicates_total", "Alert events JetStream called duplicates on their first publish: another client stored a message under the id first."),
		evicted:    d("alert_spool_evicted_total", "Spooled alert events given up, with the spool full, for a higher-ranked one (priority, then raise or end)."),
	}
}

func (c *publisherCollector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{c.published, c.duplicates, c.found, c.retries, c.refused, c.corrupt, c.evicted, c.foreign} {
		ch <- d
	}
}

func (c *publisherCollector) Collect(ch chan<- prometheus.Metric) {
	st := c.p.Stats()
	for _, m := range []struct {
		d *prometheus.Desc
		v uint64
	}{
		{c.published, st.Published}, {c.duplicates, st.Duplicates}, {c.found, st.Found},
		{c.retries, st.Retries}, {c.refused, st.Refused}, {c.corrupt, uint64(st.Corrupt)}, {c.evicted, st.Evicted}, {c.foreign, st.Foreign},
	} {
		ch <- prometheus.MustNewConstMetric(m.d, prometheus.CounterValue, float64(m.v))
	}
}
