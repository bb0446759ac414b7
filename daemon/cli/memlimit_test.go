package cli

import (
	"errors"
	"io"
	"math"
	"os"
	"runtime/debug"
	"testing"

	"github.com/KimMachineGun/automemlimit/memlimit"
	"github.com/rs/zerolog"

	"trapline/config"
)

// TestApplyMemoryLimit sets the Go runtime's real soft limit and reads it
// back (debug.SetMemoryLimit with a negative value only reads). The control
// group is stood in for by fixed providers: a test cannot give itself a
// container limit.
func TestApplyMemoryLimit(t *testing.T) {
	const gib = 1 << 30
	unreadable := func() (uint64, error) { return 0, errors.New("no memory controller") }
	for _, tc := range []struct {
		name string
		m    config.MemLimit
		from memlimit.Provider
		env  map[string]string
		want int64 // -1: the limit before the call
	}{
		{name: "a size is taken as it is", m: config.MemLimit(900 << 20), from: unreadable, want: 900 << 20},
		{name: "0 leaves the runtime's own", m: 0, from: memlimit.Limit(gib), want: -1},
		// 0.9 of 1 GiB is 966,367,641.6 bytes, rounded down to a whole byte.
		{name: "auto takes 90 % of the cgroup limit", m: config.MemLimitAuto, from: memlimit.Limit(gib), want: 966367641},
		{name: "auto with no cgroup limit sets none", m: config.MemLimitAuto,
			from: func() (uint64, error) { return 0, memlimit.ErrNoLimit }, want: math.MaxInt64},
		{name: "auto with an unreadable cgroup leaves the runtime's own", m: config.MemLimitAuto, from: unreadable, want: -1},
		{name: "GOMEMLIMIT in the environment wins over auto", m: config.MemLimitAuto, from: memlimit.Limit(gib),
			env: map[string]string{"GOMEMLIMIT": "300MiB"}, want: -1},
		{name: "AUTOMEMLIMIT=off turns auto off", m: config.MemLimitAuto, from: memlimit.Limit(gib),
			env: map[string]string{"AUTOMEMLIMIT": "off"}, want: -1},
		{name: "AUTOMEMLIMIT replaces the share", m: config.MemLimitAuto, from: memlimit.Limit(gib),
			env: map[string]string{"AUTOMEMLIMIT": "0.5"}, want: gib / 2},
	} {
		t.Run(tc.name, func(t *testing.T) {
			t.Setenv("GOMEMLIMIT", "")
			t.Setenv("AUTOMEMLIMIT", "")
			for k, v := range tc.env {
				t.Setenv(k, v)
			}
			if tc.env["AUTOMEMLIMIT"] == "" {
				// An empty AUTOMEMLIMIT is not a ratio: unset it.
				unsetenv(t, "AUTOMEMLIMIT")
			}
			// A recognisable limit before the call, restored after it.
			prev := debug.SetMemoryLimit(-1)
			t.Cleanup(func() { debug.SetMemoryLimit(prev) })
			const before = 5 << 30
			debug.SetMemoryLimit(before)
			want := tc.want
			if want == -1 {
				want = before
			}
			got := applyMemoryLimit(tc.m, tc.from, zerolog.New(io.Discard))
			if got != want || debug.SetMemoryLimit(-1) != want {
				t.Fatalf("soft limit %d (runtime %d), want %d", got, debug.SetMemoryLimit(-1), want)
			}
		})
	}
}

// unsetenv removes k from the environment for the rest of the test (t.Setenv
// restores it afterwards).
func unsetenv(t *testing.T, k string) {
	t.Helper()
	t.Setenv(k, "")
	if err := os.Unsetenv(k); err != nil {
		t.Fatal(err)
	}
}
