package ingest

import (
	"fmt"
	"net"
	"sync"
	"testing"
	"time"
)

// TestStreamSlotFollowsItsStream checks the slots a BatchSink gets: every
// event of samples carries one, a slot belongs to one stream of one
// connection, what the sink keeps there is there on the stream's next
// events, and two connections of the same streams have slots of their own.
func TestStreamSlotFollowsItsStream(t *testing.T) {
	var mu sync.Mutex
	slots := map[*StreamSlot]string{} // slot → the stream it carries
	samples, kept := 0, 0
	var bad []string
	opts := Options{Silence: -1, Direct: func(evs []Event) {
		mu.Lock()
		defer mu.Unlock()
		for i := range evs {
			e := &evs[i]
			if len(e.Samples) == 0 {
				continue
			}
			samples += len(e.Samples)
			switch id, seen := slots[e.Slot]; {
			case e.Slot == nil:
				bad = append(bad, "an event of "+e.Stream+" without a slot")
			case seen && id != e.Stream:
				bad = append(bad, fmt.Sprintf("the slot of %s carries %s", id, e.Stream))
			case seen && e.Slot.V != e.Stream:
				bad = append(bad, fmt.Sprintf("the slot of %s lost what the sink kept: %v", id, e.Slot.V))
			case seen:
				kept++
			default:
				if e.Slot.V != nil {
					bad = append(bad, fmt.Sprintf("a new slot of %s holds %v", e.Stream, e.Slot.V))
				}
				slots[e.Slot] = e.Stream
				e.Slot.V = e.Stream
			}
			e.Release()
		}
	}}
	addr := startListen(t, opts)
	const writes, conns = 20, 2
	ids := []string{"bed-a", "bed-b", "bed-c"}
	for k := range conns {
		c, err := net.Dial("tcp", addr)
		if err != nil {
			t.Fatal(err)
		}
		defer c.Close()
		_, _ = c.Write([]byte("stream,time[s],pressure[cmH2O],flow[L/min]\n"))
		for n := range writes {
			var b []byte
			for _, id := range ids {
				b = fmt.Appendf(b, "%s,%.2f,5,%d\n", id, float64(n+k*writes)/100, n)
			}
			if _, err := c.Write(b); err != nil {
				t.Fatal(err)
			}
			time.Sleep(2 * time.Millisecond)
		}
	}
	waitHandedOn(t, 5*time.Second, conns*writes*len(ids), func() int { mu.Lock(); defer mu.Unlock(); return samples })
	mu.Lock()
	defer mu.Unlock()
	for _, b := range bad {
		t.Error(b)
	}
	if len(slots) != conns*len(ids) {
		t.Errorf("%d slots, want one per stream and connection (%d): %v", len(slots), conns*len(ids), slots)
	}
	if kept == 0 {
		t.Error("no stream came back to its slot")
	}
	t.Logf("%d samples, %d slots, %d events found what the sink kept", samples, len(slots), kept)
}
