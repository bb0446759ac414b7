// Package keyhint suggests the known key nearest to a misspelt one. It is
// shared by the configuration loader and the simulator's scenario and grid
// files, and imports nothing of the project.
package keyhint

import "strings"

// MaxDistance is the largest edit distance still taken for a typo.
const MaxDistance = 2

// Nearest returns the name in names closest to key (ignoring case), when
// it is at most MaxDistance edits away; failing that, the first name whose
// beginning is that close to key, so that a key written without its unit
// ("resistanse" for resistance_cmh2o_s_per_l) still finds its name.
func Nearest(key string, names []string) (string, bool) {
	key = strings.ToLower(key)
	best, bestD := "", MaxDistance+1
	for _, n := range names {
		if d := Distance(key, strings.ToLower(n)); d < bestD {
			best, bestD = n, d
		}
	}
	if best != "" || len(key) < 4 {
		return best, best != ""
	}
	for _, n := range names {
		if len(n) > len(key) && Distance(key, strings.ToLower(n[:len(key)])) <= MaxDistance-1 {
			return n, true
		}
	}
	return "", false
}

// Distance is the Levenshtein distance between a and b (V. I. Levenshtein,
// "Binary codes capable of correcting deletions, insertions and reversals",
// Soviet Physics Doklady 10(8), 1966), computed with one row of the usual
// dynamic programme.
func Distance(a, b string) int {
	ra, rb := []rune(a), []rune(b)
	row := make([]int, len(rb)+1)
	for j := range row {
		row[j] = j
	}
	for i := 1; i <= len(ra); i++ {
		prev := row[0]
		row[0] = i
		for j := 1; j <= len(rb); j++ {
			cur := row[j]
			cost := 1
			if ra[i-1] == rb[j-1] {
				cost = 0
			}
			row[j] = min(row[j]+1, row[j-1]+1, prev+cost)
			prev = cur
		}
	}
	return row[len(rb)]
}
