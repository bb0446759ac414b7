package alerts

import (
	"errors"
	"strings"
	"testing"
)

// TestCheckAck: the acknowledgement requests refused before they reach a
// pipeline, and the ones let through.
func TestCheckAck(t *testing.T) {
	for _, tc := range []struct {
		name, stream, id, by string
		ok                   bool
	}{
		{"plain", "bed-1", "bed-1/air-trapping/1796119203200", "night shift", true},
		{"no name", "bed-1", "bed-1/air-trapping/1796119203200", "", true},
		{"accents", "bed-1", "bed-1/air-trapping/1", "Dr Müller", true},
		{"any stream", "", "bed-9/air-trapping/1", "", true},
		{"empty id", "bed-1", "", "x", false},
		{"malformed id", "bed-1", "bed-1/air-trapping", "x", false},
		{"letters for digits", "bed-1", "bed-1/air-trapping/12a", "x", false},
		{"wildcard", "bed-1", "bed-1/>/1", "x", false},
		{"other stream", "bed-1", "bed-2/air-trapping/1", "x", false},
		{"escape in by", "bed-1", "bed-1/air-trapping/1", "\x1b[2Jforged", false},
		{"newline in by", "bed-1", "bed-1/air-trapping/1", "a\nb", false},
		{"bidi override in by", "bed-1", "bed-1/air-trapping/1", "a\u202eb", false},
		{"invalid UTF-8", "bed-1", "bed-1/air-trapping/1", "a\xffb", false},
		{"70 kB by", "bed-1", "bed-1/air-trapping/1", strings.Repeat("a", 70_000), false},
		{"long id", "bed-1", "bed-1/air-trapping/" + strings.Repeat("1", 300), "", false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			err := CheckAck(tc.stream, tc.id, tc.by)
			if tc.ok != (err == nil) {
				t.Fatalf("CheckAck(%q, %.40q, %.40q) = %v, want ok %v", tc.stream, tc.id, tc.by, err, tc.ok)
			}
			if err != nil && !errors.Is(err, ErrBadAck) {
				t.Errorf("error %v does not wrap ErrBadAck", err)
			}
		})
	}
}

// TestCleanText: control and format characters go, the rest stays.
func TestCleanText(t *testing.T) {
	for in, want := range map[string]string{
		"night shift":         "night shift",
		"\x1b[2Jforged":       "[2Jforged",
		"a\nb\tc\a":           "abc",
		"a\u202eb\u200bc":     "abc",
		"a\xffb":              "a\uFFFDb",
		"Dr Müller, 12 cmH₂O": "Dr Müller, 12 cmH₂O",
	} {
		if got := CleanText(in); got != want {
			t.Errorf("CleanText(%q) = %q, want %q", in, got, want)
		}
	}
}
