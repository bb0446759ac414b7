package alerts

import (
	"testing"

	"trapline/analyze"
)

// TestLifecycleTimeNeverGoesBack: an alarm raised at stream time 36 s and
// cleared by findings stamped 30 to 32 s (the device's time stamps resume
// behind the extrapolated time of the raise) is cleared at 36 s, not
// before its raise; every event of a condition has t_s at or after the one
// before.
func TestLifecycleTimeNeverGoesBack(t *testing.T) {
	l := NewLifecycle("bed-7", DefaultLifecycleConfig())
	var evs []Event
	for _, f := range []analyze.Finding{
		finding(36, true, lo), finding(30, false, lo), finding(31, false, lo), finding(32, false, lo),
		finding(33, false, lo), finding(40, true, lo),
	} {
		evs = append(evs, l.Update(f, epoch)...)
	}
	if len(evs) < 2 || evs[0].State != Raised || evs[1].State != Cleared {
		t.Fatalf("events %+v, want raised then cleared", evs)
	}
	for i := 1; i < len(evs); i++ {
		if evs[i].TS < evs[i-1].TS {
			t.Errorf("%s at t_s %.3f before the %s at %.3f", evs[i].State, evs[i].TS, evs[i-1].State, evs[i-1].TS)
		}
	}
	if evs[1].TS != 36 {
		t.Errorf("cleared at t_s %.3f, want 36 (the raise)", evs[1].TS)
	}
}
