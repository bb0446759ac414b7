package config

import (
	"fmt"
	"math"
	"strconv"
	"strings"
)

// Size is a number of bytes. In a config file it is written with a unit,
// binary ("64MiB", "1GiB") or decimal ("500MB"), or as a plain integer of
// bytes.
type Size int64

// Byte-size units. Binary units are powers of 1024 (IEC 80000-13), decimal
// units powers of 1000 (SI).
const (
	Byte Size = 1
	KiB       = 1024 * Byte
	MiB       = 1024 * KiB
	GiB       = 1024 * MiB
	TiB       = 1024 * GiB
	KB        = 1000 * Byte
	MB        = 1000 * KB
	GB        = 1000 * MB
	TB        = 1000 * GB
)

// sizeUnits lists the accepted units; String tries them in this order, so
// the largest exact unit wins and binary units are preferred.
var sizeUnits = []struct {
	name string
	size Size
}{
	{"TiB", TiB}, {"GiB", GiB}, {"MiB", MiB}, {"KiB", KiB},
	{"TB", TB}, {"GB", GB}, {"MB", MB}, {"kB", KB},
}

// ParseSize parses a size such as "1GiB", "64 MiB", "1.5GiB", "500MB",
// "4096B" or "4096". Units are case-insensitive; the result must be a whole,
// non-negative number of bytes that fits in an int64.
func ParseSize(s string) (Size, error) {
	t := strings.TrimSpace(s)
	i := 0
	for i < len(t) && (t[i] >= '0' && t[i] <= '9' || t[i] == '.') {
		i++
	}
	num, unit := t[:i], strings.TrimSpace(t[i:])
	if num == "" {
		return 0, fmt.Errorf("size %q: want a number of bytes with a unit, like 64MiB or 1GiB", s)
	}
	mult := Byte
	if unit != "" && !strings.EqualFold(unit, "B") {
		found := false
		for _, u := range sizeUnits {
			if strings.EqualFold(unit, u.name) {
				mult, found = u.size, true
				break
			}
		}
		if !found {
			return 0, fmt.Errorf("size %q: unknown unit %q (want B, KiB, MiB, GiB, TiB, kB, MB, GB or TB)", s, unit)
		}
	}
	if !strings.Contains(num, ".") {
		n, err := strconv.ParseInt(num, 10, 64)
		if err != nil || n > math.MaxInt64/int64(mult) {
			return 0, fmt.Errorf("size %q: too large", s)
		}
		return Size(n) * mult, nil
	}
	f, err := strconv.ParseFloat(num, 64)
	if err != nil {
		return 0, fmt.Errorf("size %q: want a number of bytes with a unit, like 64MiB or 1GiB", s)
	}
	return sizeFromFloat(f*float64(mult), s)
}

// sizeFromFloat converts a byte count that came as a float (a YAML or JSON
// number, or a fractional size) and refuses fractions of a byte.
func sizeFromFloat(b float64, orig string) (Size, error) {
	if math.IsNaN(b) || b < 0 || b >= math.MaxInt64 {
		return 0, fmt.Errorf("size %s: out of range", orig)
	}
	if b != math.Trunc(b) {
		return 0, fmt.Errorf("size %s: not a whole number of bytes", orig)
	}
	return Size(b), nil
}

// String writes the size with the largest unit that represents it exactly,
// so that String and ParseSize round-trip.
func (s Size) String() string {
	if s > 0 {
		for _, u := range sizeUnits {
			if s%u.size == 0 {
				return strconv.FormatInt(int64(s/u.size), 10) + u.name
			}
		}
	}
	return strconv.FormatInt(int64(s), 10) + "B"
}

// MarshalText writes the size as String does.
func (s Size) MarshalText() ([]byte, error) { return []byte(s.String()), nil }

// UnmarshalText parses the size as ParseSize does.
func (s *Size) UnmarshalText(b []byte) error {
	v, err := ParseSize(string(b))
	if err != nil {
		return err
	}
	*s = v
	return nil
}

// MemLimit is the value of memory_limit: a size, 0 for none, or
// MemLimitAuto, written "auto", for a share of the memory limit of the
// process's control group (the container's limit).
type MemLimit int64

// MemLimitAuto is memory_limit: auto.
const MemLimitAuto MemLimit = -1

// ParseMemLimit parses "auto" (any case) or a size as ParseSize does.
func ParseMemLimit(s string) (MemLimit, error) {
	if strings.EqualFold(strings.TrimSpace(s), "auto") {
		return MemLimitAuto, nil
	}
	z, err := ParseSize(s)
	if err != nil {
		return 0, fmt.Errorf("%w, or auto", err)
	}
	return MemLimit(z), nil
}

// String writes "auto" or the size as Size.String does.
func (m MemLimit) String() string {
	if m == MemLimitAuto {
		return "auto"
	}
	return Size(m).String()
}

// MarshalText writes the limit as String does.
func (m MemLimit) MarshalText() ([]byte, error) { return []byte(m.String()), nil }

// UnmarshalText parses the limit as ParseMemLimit does.
func (m *MemLimit) UnmarshalText(b []byte) error {
	v, err := ParseMemLimit(string(b))
	if err != nil {
		return err
	}
	*m = v
	return nil
}
