package ingest

import (
	"context"
	"fmt"
	"net"
	"sync"
	"testing"
	"time"
)

// holdRun feeds a tcp-listen source with hold as a live sender of three
// streams would (one line of each every 5 ms, 40 writes), then goes quiet
// with the silence report disabled, and returns the samples per stream and
// the largest event seen once every sample has arrived.
func holdRun(t *testing.T, hold time.Duration) (map[string][]float64, int) {
	t.Helper()
	var mu sync.Mutex
	got := map[string][]float64{}
	largest, total := 0, 0
	opts := Options{Hold: hold, Silence: -1, Direct: func(evs []Event) {
		mu.Lock()
		defer mu.Unlock()
		for i := range evs {
			for _, s := range evs[i].Samples {
				got[evs[i].Stream] = append(got[evs[i].Stream], s.TimeS)
			}
			largest = max(largest, len(evs[i].Samples))
			total += len(evs[i].Samples)
			evs[i].Release()
		}
	}}
	c, err := net.Dial("tcp", startListen(t, opts))
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	const writes = 40
	_, _ = c.Write([]byte("stream,time[s],pressure[cmH2O],flow[L/min]\n"))
	for n := range writes {
		var b []byte
		for _, id := range []string{"bed-a", "bed-b", "bed-c"} {
			b = fmt.Appendf(b, "%s,%.2f,5,%d\n", id, float64(n)/100, n)
		}
		if _, err := c.Write(b); err != nil {
			t.Fatal(err)
		}
		time.Sleep(5 * time.Millisecond)
	}
	// The link stays open and quiet: held samples must come out by
	// themselves, long before anything else would flush them.
	waitHandedOn(t, 2*time.Second, 3*writes, func() int { mu.Lock(); defer mu.Unlock(); return total })
	mu.Lock()
	defer mu.Unlock()
	return got, largest
}

// Holding a live link's reads hands on the same samples, in order, in
// fewer and larger events, and releases them when the link goes quiet.
func TestHoldDecodesReadsTogether(t *testing.T) {
	for _, tc := range []struct {
		hold             time.Duration
		minLargest, maxL int
	}{
		{0, 1, 2},                       // read by read: one sample (rarely two) per stream per event
		{100 * time.Millisecond, 4, 40}, // 100 ms of 5 ms writes: many per event
	} {
		got, largest := holdRun(t, tc.hold)
		for _, id := range []string{"bed-a", "bed-b", "bed-c"} {
			ts := got[id]
			if len(ts) != 40 {
				t.Fatalf("hold %v: %s has %d samples, want 40", tc.hold, id, len(ts))
			}
			for k, v := range ts {
				if want := float64(k) / 100; v != want {
					t.Fatalf("hold %v: %s sample %d at %v s, want %v s", tc.hold, id, k, v, want)
				}
			}
		}
		if largest < tc.minLargest || largest > tc.maxL {
			t.Errorf("hold %v: largest event %d samples, want %d to %d", tc.hold, largest, tc.minLargest, tc.maxL)
		}
	}
}

// startListen opens a tcp-listen source on 127.0.0.1 with opts, runs it
// until the test ends, and returns its address.
func startListen(t *testing.T, opts Options) string {
	t.Helper()
	src, err := Open("tcp-listen://127.0.0.1:0", opts)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- src.Run(ctx, nil) }()
	t.Cleanup(func() { cancel(); <-done })
	for src.(Listener).Addr() == "" {
		time.Sleep(time.Millisecond)
	}
	return src.(Listener).Addr()
}

// waitHandedOn waits up to d for handed() to reach want samples.
func waitHandedOn(t *testing.T, d time.Duration, want int, handed func() int) {
	t.Helper()
	deadline := time.Now().Add(d)
	for {
		n := handed()
		if n == want {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("%d of %d samples handed on", n, want)
		}
		time.Sleep(5 * time.Millisecond)
	}
}
