package analyze

import (
	"math"
	"strconv"
	"testing"
)

// TestAppendNumberInRecord checks the numbers of a breath record as they
// are written after a key, in a buffer that already holds the record: the
// digits are those of strconv.FormatFloat (the Go standard library, 'f'
// format) with trailing zeros of the fraction trimmed, a value that rounds
// to zero from below is written 0 (JSON allows -0, but a reader would take
// it for a sign worth reporting), and NaN or infinity is null.
func TestAppendNumberInRecord(t *testing.T) {
	for _, tc := range []struct {
		v    float64
		prec int
		want string
	}{
		{1.5, 2, "1.5"},
		{2, 3, "2"},
		{-1.25, 2, "-1.25"},
		{-0.004, 2, "0"},
		{-0.3, 0, "0"},
		{-0.6, 0, strconv.FormatFloat(-0.6, 'f', 0, 64)}, // "-1"
		{0.0004, 2, "0"},
		{100, 1, "100"},
		{math.NaN(), 2, "null"},
		{math.Inf(-1), 2, "null"},
	} {
		got := string(appendNumber([]byte(`{"a":-0,"x":`), tc.v, tc.prec))
		if want := `{"a":-0,"x":` + tc.want; got != want {
			t.Errorf("appendNumber(%v, %d) = %s, want %s", tc.v, tc.prec, got, want)
		}
	}
}
