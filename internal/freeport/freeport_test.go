package freeport

import (
	"fmt"
	"net"
	"testing"
)

// TestTakeBelowTheEphemeralRange takes ports and binds each: they are
// free, and below the range that port 0 draws from (when the range leaves
// room for them).
func TestTakeBelowTheEphemeralRange(t *testing.T) {
	lo := ephemeralLow()
	for range 20 {
		p := Take(t)
		if lo-lowPort >= 1000 && (p < lowPort || p >= lo) {
			t.Fatalf("port %d outside [%d, %d)", p, lowPort, lo)
		}
		ln, err := net.Listen("tcp", fmt.Sprintf("127.0.0.1:%d", p))
		if err != nil {
			t.Fatalf("port %d not free: %v", p, err)
		}
		ln.Close()
	}
}

// TestTakeSkipsABoundPort offers a held port as the first candidates: the
// next free candidate comes back, and when every candidate is held, a port
// the kernel chose.
func TestTakeSkipsABoundPort(t *testing.T) {
	held := Take(t)
	ln, err := net.Listen("tcp", fmt.Sprintf("127.0.0.1:%d", held))
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	free := Take(t)
	n := 0
	if p := takeFrom(t, func() int {
		if n++; n <= 3 {
			return held
		}
		return free
	}); p != free || n != 4 {
		t.Fatalf("got port %d after %d candidates, want %d after 4", p, n, free)
	}
	p := takeFrom(t, func() int { return held })
	if p == held || p == 0 {
		t.Fatalf("every candidate held: got %d", p)
	}
}
