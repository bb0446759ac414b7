package daemon

import (
	"context"
	"fmt"
	"sync"
	"sync/atomic"

	"github.com/prometheus/client_golang/prometheus"

	"trapline/analyze"
	"trapline/ingest/record"
)

// CondRecordingImpaired is the technical condition raised on every stream
// while the raw recording drops what its sources read (a full or failing
// disk, or a disk slower than the sources). Analysis and alerts go on; only
// the copy of the raw signal is incomplete.
const CondRecordingImpaired = "recording-impaired"

// recorder is the daemon's raw recording: one writer for every stream,
// fed through each source's tap (docs/recording.md).
type recorder struct {
	w     *record.Writer
	once  sync.Once                    // closes w
	state atomic.Pointer[record.Stats] // the writer's last reported state
}

// openRecorder opens the recording writer of the configuration, or
// returns nil when recording is off. The writer runs until Close.
func (d *Daemon) openRecorder(ctx context.Context) (*recorder, error) {
	if !d.cfg.Recording.Enabled {
		return nil, nil
	}
	r := &recorder{}
	log := d.log.With().Str("component", "recording").Logger()
	opts := d.cfg.RecordOptions()
	opts.Create = d.opts.RecordFile
	opts.OnState = func(st record.Stats) {
		r.state.Store(&st)
		if st.Degraded {
			log.Warn().Str("reason", st.Reason).Uint64("dropped_records", st.DroppedRecords).
				Msg("recording impaired: raw input is being dropped; analysis continues")
		} else {
			log.Info().Uint64("dropped_records", st.DroppedRecords).Msg("recording writes again")
		}
	}
	w, err := record.Open(ctx, opts)
	if err != nil {
		return nil, fmt.Errorf("recording (recording.dir %s): %w", opts.Dir, err)
	}
	r.w = w
	d.m.reg.MustRegister(&recordCollector{w: w})
	log.Info().Str("dir", opts.Dir).Msg("recording raw input")
	return r, nil
}

// startRecorder opens the recording when it is enabled. The recorder
// outlives the streams: closeRecorder, once every source has stopped,
// writes its buffer and syncs its segments.
func (d *Daemon) startRecorder(ctx context.Context) error {
	rec, err := d.openRecorder(context.WithoutCancel(ctx))
	if err != nil {
		return err
	}
	d.rec = rec
	if rec != nil {
		d.recPtr.Store(rec)
	}
	return nil
}

// startStreams opens the recording, if enabled, and then makes the
// streams, whose sources feed it.
func (d *Daemon) startStreams(ctx context.Context, del *delivery) error {
	if err := d.startRecorder(ctx); err != nil {
		return err
	}
	return d.addStreams(del)
}

// closeRecorder closes the recording, if any; a second call does nothing
// more.
func (d *Daemon) closeRecorder() {
	if d.rec == nil {
		return
	}
	d.rec.once.Do(func() {
		if err := d.rec.w.Close(); err != nil {
			d.log.Warn().Err(err).Msg("recording: closing the last segments failed")
		}
	})
}

// recStats returns the recorder's counters, or nil before it is open
// (tests).
func (d *Daemon) recStats() *record.Stats {
	r := d.recPtr.Load()
	if r == nil {
		return nil
	}
	st := r.w.Stats()
	return &st
}

// finding returns the recording-impaired finding of the moment: present
// while the writer is degraded. The pipeline puts it on its stream's time
// axis.
func (r *recorder) finding() analyze.Finding {
	f := analyze.Finding{Condition: CondRecordingImpaired, Class: analyze.Technical, BreathSeq: -1}
	st := r.state.Load()
	if st == nil || !st.Degraded {
		f.Message = "raw recording writes again"
		return f
	}
	f.Present, f.Severity = true, analyze.SeverityLow
	f.Evidence = map[string]float64{
		"dropped_records": float64(st.DroppedRecords),
		"dropped_bytes":   float64(st.DroppedBytes),
		"write_errors":    float64(st.WriteErrors),
	}
	f.Message = "raw recording impaired (" + st.Reason + "): input is not being kept; analysis and alerts continue"
	return f
}

var (
	descRecRecords = prometheus.NewDesc(metricNamespace+"_recording_records_total",
		"Reads written to the raw recording.", nil, nil)
	descRecBytes = prometheus.NewDesc(metricNamespace+"_recording_bytes_total",
		"Payload bytes written to the raw recording.", nil, nil)
	descRecDropped = prometheus.NewDesc(metricNamespace+"_recording_dropped_records_total",
		"Reads the raw recording dropped (buffer full, disk error).", nil, nil)
	descRecDroppedBytes = prometheus.NewDesc(metricNamespace+"_recording_dropped_bytes_total",
		"Payload bytes of the reads the raw recording dropped.", nil, nil)
	descRecErrors = prometheus.NewDesc(metricNamespace+"_recording_write_errors_total",
		"Failed writes, syncs, creates and closes of recording segments.", nil, nil)
	descRecSegments = prometheus.NewDesc(metricNamespace+"_recording_segments",
		"Segment files in the recording directory.", nil, nil)
	descRecDiskBytes = prometheus.NewDesc(metricNamespace+"_recording_disk_bytes",
		"Size of the segment files in the recording directory.", nil, nil)
	descRecDeleted = prometheus.NewDesc(metricNamespace+"_recording_deleted_segments_total",
		"Segments deleted by retention (recording.max_age, recording.max_bytes).", nil, nil)
	descRecDegraded = prometheus.NewDesc(metricNamespace+"_recording_degraded",
		"1 while the raw recording drops input.", nil, nil)
)

// recordCollector reports the recording writer's counters at scrape time.
type recordCollector struct{ w *record.Writer }

func (c *recordCollector) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range []*prometheus.Desc{descRecRecords, descRecBytes, descRecDropped, descRecDroppedBytes,
		descRecErrors, descRecSegments, descRecDiskBytes, descRecDeleted, descRecDegraded} {
		ch <- d
	}
}

func (c *recordCollector) Collect(ch chan<- prometheus.Metric) {
	s := c.w.Stats()
	deg := 0.0
	if s.Degraded {
		deg = 1
	}
	for _, m := range []struct {
		d *prometheus.Desc
		t prometheus.ValueType
		v float64
	}{
		{descRecRecords, prometheus.CounterValue, float64(s.Records)},
		{descRecBytes, prometheus.CounterValue, float64(s.Bytes)},
		{descRecDropped, prometheus.CounterValue, float64(s.DroppedRecords)},
		{descRecDroppedBytes, prometheus.CounterValue, float64(s.DroppedBytes)},
		{descRecErrors, prometheus.CounterValue, float64(s.WriteErrors)},
		{descRecSegments, prometheus.GaugeValue, float64(s.Segments)},
		{descRecDiskBytes, prometheus.GaugeValue, float64(s.DiskBytes)},
		{descRecDeleted, prometheus.CounterValue, float64(s.Deleted)},
		{descRecDegraded, prometheus.GaugeValue, deg},
	} {
		ch <- prometheus.MustNewConstMetric(m.d, m.t, m.v)
	}
}
