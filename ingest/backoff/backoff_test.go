package backoff

import (
	"context"
	"testing"
	"time"
)

// fakeClock fires every timer at once and records the waits asked for.
type fakeClock struct{ waits []time.Duration }

func (f *fakeClock) Now() time.Time { return time.Unix(0, 0) }
func (f *fakeClock) After(d time.Duration) (<-chan time.Time, func() bool) {
	f.waits = append(f.waits, d)
	c := make(chan time.Time, 1)
	c <- time.Unix(0, 0)
	return c, func() bool { return false }
}

// TestDoublesUpToMax checks the sequence Min, 2·Min, 4·Min … capped at Max
// (a capped binary exponential backoff, common practice).
func TestDoublesUpToMax(t *testing.T) {
	clk := &fakeClock{}
	b := Backoff{Min: 100 * time.Millisecond, Max: time.Second, Clock: clk}
	for range 6 {
		if !b.Wait(context.Background()) {
			t.Fatal("wait ended early")
		}
	}
	want := []time.Duration{100, 200, 400, 800, 1000, 1000}
	for i, w := range want {
		if clk.waits[i] != w*time.Millisecond {
			t.Fatalf("waits %v, want %v ms", clk.waits, want)
		}
	}
	b.Reset()
	if got := b.Next(); got != 100*time.Millisecond {
		t.Errorf("after reset %v, want 100ms", got)
	}
}

// TestJitterStaysBelowNominal checks that jitter only shortens a wait, by
// at most the given fraction.
func TestJitterStaysBelowNominal(t *testing.T) {
	b := Backoff{Min: time.Second, Max: time.Second, Jitter: 0.25}
	varied := false
	for range 200 {
		d := b.Next()
		if d > time.Second || d < 750*time.Millisecond {
			t.Fatalf("wait %v outside [0.75 s, 1 s]", d)
		}
		varied = varied || d != time.Second
	}
	if !varied {
		t.Error("jitter never changed a wait")
	}
}

// TestWaitStopsOnCancel checks that a cancelled context ends a wait.
func TestWaitStopsOnCancel(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	b := Backoff{Min: time.Hour, Max: time.Hour}
	if b.Wait(ctx) {
		t.Error("Wait returned true on a cancelled context")
	}
}
