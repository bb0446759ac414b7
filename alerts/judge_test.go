package alerts

import (
	"testing"
	"time"
)

// TestOfflineClock checks the made-up ticks against plain counting: one
// tick per whole second of stream time after the first sample, through a
// gap too, none for a clock that went back (it restarts), and at most an
// hour's worth for a gap of a day.
func TestOfflineClock(t *testing.T) {
	epoch := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	tests := []struct {
		name  string
		times []float64
		want  []float64
	}{
		{"first sample starts the clock", []float64{10}, nil},
		{"one tick per second", []float64{10, 10.5, 11, 11.5, 12.2}, []float64{11, 12}},
		{"a gap gets every tick", []float64{0, 4.5}, []float64{1, 2, 3, 4}},
		{"clock back restarts", []float64{100, 101, 50, 51.5}, []float64{101, 51}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			c := OfflineClock{Epoch: epoch}
			var got []float64
			for _, ts := range tc.times {
				c.Until(ts, func(tickS float64) {
					if w := c.Wall(tickS); !w.Equal(epoch.Add(time.Duration(tickS * float64(time.Second)))) {
						t.Errorf("wall of %g s = %v", tickS, w)
					}
					got = append(got, tickS)
				})
			}
			if len(got) != len(tc.want) {
				t.Fatalf("ticks %v, want %v", got, tc.want)
			}
			for i := range got {
				if got[i] != tc.want[i] {
					t.Fatalf("ticks %v, want %v", got, tc.want)
				}
			}
		})
	}
	t.Run("a day of silence is cut to an hour", func(t *testing.T) {
		c := OfflineClock{Epoch: epoch}
		n := 0
		c.Until(0, func(float64) { n++ })
		c.Until(86400, func(float64) { n++ })
		if n != maxOfflineTicks {
			t.Fatalf("%d ticks in a day-long gap, want %d", n, maxOfflineTicks)
		}
		// The ticks carry on from the present (86401, 86402), not from where
		// they stopped.
		n = 0
		c.Until(86402, func(float64) { n++ })
		if n != 2 {
			t.Fatalf("%d ticks two seconds after the gap, want 2", n)
		}
	})
}
