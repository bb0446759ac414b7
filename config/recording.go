package config

import (
	"path/filepath"
	"time"

	"trapline/ingest/record"
)

// Recording configures the raw recording of every stream's bytes
// (docs/recording.md).
type Recording struct {
	// Enabled turns the recording on.
	Enabled bool `mapstructure:"enabled"`
	// Dir is the recording directory; empty means <data_dir>/recording.
	Dir string `mapstructure:"dir"`
	// Segment is the wall-time span of one segment file per stream.
	Segment time.Duration `mapstructure:"segment"`
	// MaxAge deletes segments older than this; 0 keeps them by age.
	MaxAge time.Duration `mapstructure:"max_age"`
	// MaxBytes deletes the oldest segments while the recording is larger;
	// 0 keeps them by size.
	MaxBytes Size `mapstructure:"max_bytes"`
	// SyncEvery is the period of fsync of the open segments.
	SyncEvery time.Duration `mapstructure:"sync_every"`
	// Buffer bounds the bytes waiting for the disk; reads beyond it are
	// dropped and counted, never waited for.
	Buffer Size `mapstructure:"buffer"`
}

// defaultRecording is off, with ten-minute segments kept for 30 days and
// at most 20 GiB.
func defaultRecording() Recording {
	return Recording{
		Segment:   10 * time.Minute,
		MaxAge:    30 * 24 * time.Hour,
		MaxBytes:  20 * GiB,
		SyncEvery: 10 * time.Second,
		Buffer:    16 * MiB,
	}
}

// RecordingDir returns the recording directory: recording.dir, or
// <data_dir>/recording when that is empty.
func (c *Config) RecordingDir() string {
	if c.Recording.Dir != "" {
		return c.Recording.Dir
	}
	return filepath.Join(c.DataDir, "recording")
}

// RecordOptions returns the recorder's options for this configuration;
// the caller adds OnState (to raise the technical alert) and opens the
// writer with record.Open.
func (c *Config) RecordOptions() record.Options {
	r := c.Recording
	return record.Options{
		Dir:           c.RecordingDir(),
		SegmentLength: r.Segment,
		MaxAge:        r.MaxAge,
		MaxBytes:      int64(r.MaxBytes),
		SyncEvery:     r.SyncEvery,
		BufferBytes:   int(r.Buffer),
	}
}

// validateRecording checks the recording section.
func (c *Config) validateRecording(p *problems) {
	r := c.Recording
	durationIn(p, "recording.segment", r.Segment, 10*time.Second, 24*time.Hour)
	zeroOrIn(p, "recording.max_age", r.MaxAge, time.Minute)
	zeroOrAtLeast(p, "recording.max_bytes", r.MaxBytes, MiB)
	durationIn(p, "recording.sync_every", r.SyncEvery, 100*time.Millisecond, time.Hour)
	sizeAtLeast(p, "recording.buffer", r.Buffer, 64*KiB)
	if r.Buffer > GiB {
		p.addf("recording.buffer", "%s is more than 1GiB of memory", r.Buffer)
	}
}
