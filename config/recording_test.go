package config

import (
	"path/filepath"
	"strings"
	"testing"
	"time"
)

func TestRecordingSection(t *testing.T) {
	c, err := LoadBytes([]byte("data_dir: /srv/t\nrecording: {enabled: true, segment: 5m, max_bytes: 2GiB}\n"), "yaml", nil)
	if err != nil {
		t.Fatal(err)
	}
	o := c.RecordOptions()
	if !c.Recording.Enabled || o.Dir != filepath.Join("/srv/t", "recording") || o.SegmentLength != 5*time.Minute ||
		o.MaxBytes != 2<<30 || o.MaxAge != 720*time.Hour || o.BufferBytes != 16<<20 {
		t.Errorf("options %+v", o)
	}
	_, err = LoadBytes([]byte("recording: {segment: 1s, buffer: 1KiB, sync_every: 0s}\n"), "yaml", nil)
	for _, want := range []string{"recording.segment:", "recording.buffer:", "recording.sync_every:"} {
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("no %s problem in %v", want, err)
		}
	}
}
