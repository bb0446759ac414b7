package ingest

import (
	"context"
	"path/filepath"
	"reflect"
	"sync"
	"testing"
	"time"
)

// collect runs a source to its end and returns its samples per stream.
func collect(t *testing.T, url string, direct bool) map[string][]Sample {
	t.Helper()
	got := map[string][]Sample{}
	var mu sync.Mutex
	opts := Options{}
	if direct {
		opts.Direct = func(evs []Event) {
			mu.Lock()
			defer mu.Unlock()
			for i := range evs {
				got[evs[i].Stream] = append(got[evs[i].Stream], evs[i].Samples...)
				evs[i].Release()
			}
		}
	}
	src, err := Open(url, opts)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	err = src.Run(ctx, func(ev Event) {
		mu.Lock()
		defer mu.Unlock()
		got[ev.Stream] = append(got[ev.Stream], ev.Samples...)
	})
	if err != nil {
		t.Fatal(err)
	}
	return got
}

// A direct sink sees exactly the samples, per stream and in order, that the
// buffered Run delivers: the hand-off it removes changes nothing else.
func TestDirectSinkMatchesRun(t *testing.T) {
	for _, f := range []string{"multi-stream-crlf.csv", "bench-basic.csv"} {
		t.Run(f, func(t *testing.T) {
			p, err := filepath.Abs(filepath.Join("testdata", "text", f))
			if err != nil {
				t.Fatal(err)
			}
			want := collect(t, "file://"+p, false)
			got := collect(t, "file://"+p, true)
			if len(want) == 0 {
				t.Fatal("no samples read")
			}
			// NaN marks a missing volume; compare it as equal to itself.
			for _, m := range []map[string][]Sample{got, want} {
				for _, ss := range m {
					for i := range ss {
						if ss[i].VolumeL != ss[i].VolumeL {
							ss[i].VolumeL = -1
						}
					}
				}
			}
			if !reflect.DeepEqual(got, want) {
				t.Errorf("direct sink: %d streams, buffered: %d; samples differ", len(got), len(want))
			}
		})
	}
}
