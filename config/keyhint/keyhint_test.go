package keyhint

import "testing"

// TestDistance checks textbook values of the Levenshtein distance
// (Levenshtein 1966; kitten/sitting = 3 is the usual worked example).
func TestDistance(t *testing.T) {
	for _, tc := range []struct {
		a, b string
		want int
	}{{"kitten", "sitting", 3}, {"", "abc", 3}, {"flaw", "lawn", 2}, {"same", "same", 0}} {
		if got := Distance(tc.a, tc.b); got != tc.want {
			t.Errorf("Distance(%q, %q) = %d, want %d", tc.a, tc.b, got, tc.want)
		}
	}
}

func TestNearest(t *testing.T) {
	names := []string{"rate_bpm", "resistance_cmh2o_s_per_l", "resistance_2_cmh2o_s_per_l", "peep_cmh2o"}
	for _, tc := range []struct {
		key, want string
		ok        bool
	}{
		{"rate_bmp", "rate_bpm", true},
		{"resistanse", "resistance_cmh2o_s_per_l", true},
		{"PEEP_cmh2o", "peep_cmh2o", true},
		{"colour", "", false},
		{"pep", "", false},
	} {
		got, ok := Nearest(tc.key, names)
		if got != tc.want || ok != tc.ok {
			t.Errorf("Nearest(%q) = %q, %v; want %q, %v", tc.key, got, ok, tc.want, tc.ok)
		}
	}
}
