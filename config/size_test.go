package config

import (
	"strings"
	"testing"
)

func TestParseSize(t *testing.T) {
	// Binary prefixes are powers of 1024 and decimal ones powers of 1000
	// (IEC 80000-13:2008, Quantities and units, Part 13: Information science
	// and technology).
	for _, tc := range []struct {
		in   string
		want Size
		str  string
	}{
		{"0", 0, "0B"},
		{"4096", 4096, "4KiB"},
		{"4097B", 4097, "4097B"},
		{"1KiB", 1024, "1KiB"},
		{"64MiB", 67108864, "64MiB"},
		{"64 mib", 67108864, "64MiB"},
		{"1GiB", 1073741824, "1GiB"},
		{"1.5GiB", 1610612736, "1536MiB"},
		{"2TiB", 2199023255552, "2TiB"},
		{"1kB", 1000, "1kB"},
		{"500MB", 500000000, "500MB"},
		{"3GB", 3000000000, "3GB"},
	} {
		t.Run(tc.in, func(t *testing.T) {
			got, err := ParseSize(tc.in)
			if err != nil || got != tc.want {
				t.Fatalf("ParseSize(%q) = %d, %v; want %d", tc.in, got, err, tc.want)
			}
			if got.String() != tc.str {
				t.Errorf("String() = %q, want %q", got.String(), tc.str)
			}
			back, err := ParseSize(got.String())
			if err != nil || back != got {
				t.Errorf("round trip %q -> %d, %v", got.String(), back, err)
			}
		})
	}
	for _, bad := range []string{"", "GiB", "-1GiB", "1XB", "1.0000000001KiB", "9999999999999TiB", "1..2MiB"} {
		if got, err := ParseSize(bad); err == nil {
			t.Errorf("ParseSize(%q) = %d, want an error", bad, got)
		}
	}
}

func TestParseMemLimit(t *testing.T) {
	for _, tc := range []struct {
		in   string
		want MemLimit
		str  string
	}{
		{"auto", MemLimitAuto, "auto"},
		{" AUTO ", MemLimitAuto, "auto"},
		{"0", 0, "0B"},
		{"900MiB", 900 << 20, "900MiB"},
	} {
		got, err := ParseMemLimit(tc.in)
		if err != nil || got != tc.want || got.String() != tc.str {
			t.Errorf("ParseMemLimit(%q) = %d (%q), %v; want %d (%q)", tc.in, got, got.String(), err, tc.want, tc.str)
		}
		var back MemLimit
		if err := back.UnmarshalText([]byte(got.String())); err != nil || back != got {
			t.Errorf("round trip %q -> %d, %v", got.String(), back, err)
		}
	}
	for _, bad := range []string{"", "automatic", "-1", "lots"} {
		if got, err := ParseMemLimit(bad); err == nil {
			t.Errorf("ParseMemLimit(%q) = %d, want an error", bad, got)
		} else if !strings.Contains(err.Error(), "or auto") {
			t.Errorf("ParseMemLimit(%q): %v, want it to offer auto", bad, err)
		}
	}
}
