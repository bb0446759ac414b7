// Package freeport gives tests a loopback TCP port for a server that must
// know its port before it starts: a cluster whose nodes name each other's
// routes, a daemon whose configuration names its listeners.
//
// Such a port can only be one that was free a moment before, and another
// process may bind it in between. A port the kernel hands out for port 0
// comes from its ephemeral range, the range it also takes the local ports
// of outgoing connections and of every other "any free port" listener
// from, so under parallel tests it is soon someone else's. Take chooses at
// random below that range instead, where only explicit binds land.
package freeport

import (
	"fmt"
	"math/rand/v2"
	"net"
	"os"
	"testing"
)

// Bounds of the ports Take chooses from: from lowPort up to the start of
// the kernel's ephemeral range (Linux: /proc/sys/net/ipv4/ip_local_port_range,
// 32768 by default; the other systems start it at 49152, and Take then
// stops at defaultEphemeralLow).
const (
	lowPort             = 20000
	defaultEphemeralLow = 32768
	attempts            = 64
)

// Take returns a port of 127.0.0.1 that was free a moment ago, chosen at
// random below the kernel's ephemeral range. It falls back to a port the
// kernel chooses when none of its candidates is free.
func Take(t testing.TB) int {
	t.Helper()
	hi := ephemeralLow()
	if hi-lowPort < 1000 {
		return takeFrom(t, nil)
	}
	return takeFrom(t, func() int { return lowPort + rand.IntN(hi-lowPort) })
}

// takeFrom returns the first of attempts candidates from next that can be
// bound, else (or with no next) a port the kernel chooses.
func takeFrom(t testing.TB, next func() int) int {
	t.Helper()
	for i := 0; next != nil && i < attempts; i++ {
		p := next()
		if ln, err := net.Listen("tcp", fmt.Sprintf("127.0.0.1:%d", p)); err == nil {
			ln.Close()
			return p
		}
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().(*net.TCPAddr).Port
}

// ephemeralLow returns the first port of the kernel's ephemeral range.
func ephemeralLow() int {
	b, err := os.ReadFile("/proc/sys/net/ipv4/ip_local_port_range")
	if err != nil {
		return defaultEphemeralLow
	}
	var lo, hi int
	if _, err := fmt.Sscan(string(b), &lo, &hi); err != nil || lo <= 0 {
		return defaultEphemeralLow
	}
	return lo
}
