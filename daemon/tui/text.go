// Package tui formats trapline's terminal view: the per-breath table, alert
// lines, the active alarms of a stream and the alarm summary, at a given
// width (80 columns by default, more columns on wider terminals). It only
// formats: the caller owns the terminal and writes the lines.
//
// Widths count runes: every character this package prints (digits, units,
// the arrow, τ, the ellipsis) takes one column, and Sanitize removes the
// control characters and escape sequences that would move the cursor.
package tui

import (
	"strings"
	"unicode"
	"unicode/utf8"
)

// DefaultWidth is the width of a terminal whose size is unknown.
const DefaultWidth = 80

// ellipsis marks text cut at the width.
const ellipsis = "…"

// Sanitize returns s fit to show on a terminal: escape sequences (CSI, OSC
// and the two-character ones) and control characters (C0, DEL, C1) are
// removed, as are the bidirectional formatting characters that could make
// the text read differently from what it holds; tabs and line breaks become
// one space; invalid UTF-8 becomes U+FFFD. Use it on every text that came
// from outside (messages, ids, stream names, flags).
func Sanitize(s string) string {
	clean := true
	for _, r := range s {
		if r == utf8.RuneError || unsafeRune(r) {
			clean = false
			break
		}
	}
	if clean {
		return s
	}
	var b strings.Builder
	for i := 0; i < len(s); {
		r, n := utf8.DecodeRuneInString(s[i:])
		switch {
		case r == utf8.RuneError && n <= 1:
			b.WriteRune(utf8.RuneError)
		case r == 0x1b:
			n = escapeLen(s[i:])
		case r == 0x9b: // C1 CSI
			n = n + csiLen(s[i+n:])
		case r == '\t' || r == '\n' || r == '\r':
			b.WriteByte(' ')
		case unsafeRune(r):
		default:
			b.WriteRune(r)
		}
		i += n
	}
	return b.String()
}

// unsafeRune reports whether r must not reach the terminal as is.
func unsafeRune(r rune) bool {
	return unicode.IsControl(r) || unicode.Is(unicode.Bidi_Control, r)
}

// escapeLen returns the length of the escape sequence at the start of s
// (which begins with ESC), as ECMA-48 ("Control functions for coded
// character sets", 5th edition, 1991) lays them out: CSI is ESC [ then
// parameter and intermediate bytes and one final byte in 0x40–0x7E; OSC,
// DCS, SOS, PM and APC run to BEL or ST (ESC \); any other escape is ESC and
// one more character.
func escapeLen(s string) int {
	if len(s) < 2 {
		return len(s)
	}
	switch s[1] {
	case '[':
		return 2 + csiLen(s[2:])
	case ']', 'P', 'X', '^', '_':
		for j := 2; j < len(s); j++ {
			if s[j] == 0x07 {
				return j + 1
			}
			if s[j] == 0x1b && j+1 < len(s) && s[j+1] == '\\' {
				return j + 2
			}
		}
		return len(s)
	}
	_, n := utf8.DecodeRuneInString(s[1:])
	return 1 + n
}

// csiLen returns the length of the parameters and final byte of a control
// sequence.
func csiLen(s string) int {
	for j := 0; j < len(s); j++ {
		if c := s[j]; c >= 0x40 && c <= 0x7e {
			return j + 1
		} else if c < 0x20 || c > 0x7e {
			return j
		}
	}
	return len(s)
}

// Width is the number of columns s takes (its runes).
func Width(s string) int { return utf8.RuneCountInString(s) }

// Fit cuts s to at most w columns, ending it with an ellipsis when cut.
// A width of 0 or less means no limit.
func Fit(s string, w int) string {
	if w <= 0 || Width(s) <= w {
		return s
	}
	r := []rune(s)
	return strings.TrimRight(string(r[:w-1]), " ") + ellipsis
}

// pad right-aligns s in w columns (left-aligns when left is set), cutting
// it with an ellipsis when it is wider.
func pad(s string, w int, left bool) string {
	s = Fit(s, w)
	gap := strings.Repeat(" ", w-Width(s))
	if left {
		return s + gap
	}
	return gap + s
}

// Wrap breaks s into lines of at most w columns at spaces (a word longer
// than a line is cut), keeping the spacing within a line; lines after the
// first start with indent spaces. At most maxLines lines are returned (0:
// no limit), the last one ending in an ellipsis when text was left over. A
// width of 0 or less means one line.
func Wrap(s string, w, indent, maxLines int) []string {
	if w <= 0 || Width(s) <= w {
		return []string{s}
	}
	indent = min(indent, w/2)
	lead := ""
	rest := []rune(s)
	var lines []string
	for len(rest) > 0 {
		room := w - len([]rune(lead))
		if len(rest) <= room {
			lines = append(lines, lead+string(rest))
			break
		}
		cut := room
		for j := room; j > 0; j-- {
			if rest[j] == ' ' {
				cut = j
				break
			}
		}
		lines = append(lines, lead+strings.TrimRight(string(rest[:cut]), " "))
		rest = []rune(strings.TrimLeft(string(rest[cut:]), " "))
		lead = strings.Repeat(" ", indent)
	}
	if maxLines > 0 && len(lines) > maxLines {
		lines = lines[:maxLines]
		last := lines[maxLines-1]
		if Width(last) < w {
			lines[maxLines-1] = last + ellipsis
		} else {
			lines[maxLines-1] = Fit(last+"x", w)
		}
	}
	return lines
}
