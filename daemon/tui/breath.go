package tui

import (
	"fmt"
	"math"
	"strings"

	"trapline/analyze"
)

// column is one column of the breath table.
type column struct {
	name, unit string
	width      int
	// rank orders the columns by how much they matter: rank 0 is always
	// shown, then 1 (the air-trapping estimates), then 2, 3 as width allows.
	rank  int
	value func(b *analyze.Breath) string
}

// num formats v with prec decimals, or "-" when unknown.
func num(v float64, prec int) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "-"
	}
	s := fmt.Sprintf("%.*f", prec, v)
	if s == "-0" || strings.TrimLeft(s, "-0.") == "" {
		s = strings.TrimPrefix(s, "-")
	}
	return s
}

// breathColumns are the columns in the order they are shown. Units follow
// UCUM spelling where it reads well on a terminal (cmH2O, L/min, mL, s).
var breathColumns = []column{
	{"seq", "#", 6, 0, func(b *analyze.Breath) string { return fmt.Sprint(b.Seq) }},
	{"t", "s", 7, 0, startTime},
	{"RR", "bpm", 4, 2, func(b *analyze.Breath) string { return num(b.RateBPM, 0) }},
	{"VTe", "mL", 5, 0, func(b *analyze.Breath) string { return num(b.VteML, 0) }},
	{"PIP", "cmH2O", 5, 0, func(b *analyze.Breath) string { return num(b.PeakCmH2O, 1) }},
	{"Pplat", "cmH2O", 5, 0, func(b *analyze.Breath) string { return num(b.PlateauCmH2O, 1) }},
	{"PEEP", "cmH2O", 5, 0, func(b *analyze.Breath) string { return num(b.PEEPCmH2O, 1) }},
	{"EEF", "L/min", 5, 0, func(b *analyze.Breath) string { return num(b.EndExpFlowLPM, 1) }},
	{"Te/τ", "", 5, 0, func(b *analyze.Breath) string { return num(b.TeOverTau, 2) }},
	{"PEEPi", "cmH2O", 5, 1, func(b *analyze.Breath) string { return num(b.PEEPiCmH2O, 1) }},
	{"trapped", "mL", 7, 1, func(b *analyze.Breath) string { return num(b.TrappedML, 0) }},
	{"R", "cmH2O·s/L", 9, 3, func(b *analyze.Breath) string { return num(b.RCmH2OSPerL, 1) }},
	{"C", "mL/cmH2O", 8, 3, func(b *analyze.Breath) string { return num(b.CMLPerCmH2O, 1) }},
}

// startTime is the breath's start in seconds: with a decimal while that
// fits the column, whole seconds beyond (a device clock that has run for
// days).
func startTime(b *analyze.Breath) string {
	if s := num(b.StartS, 1); len(s) <= 7 {
		return s
	}
	return num(b.StartS, 0)
}

// minFlagsWidth is the narrowest flags column worth showing.
const minFlagsWidth = 8

// BreathTable formats one line per breath in columns that fit a width. At
// 80 columns it shows seq, time, VTe, PIP, Pplat, PEEP, EEF and Te/τ, then
// PEEPi and trapped volume; wider, it adds the rate, R, C and the breath's
// flags. The units are in the second header line.
type BreathTable struct {
	width   int
	streamW int
	cols    []column
	flagsW  int
}

// NewBreathTable returns the table for a terminal width columns wide
// (DefaultWidth when width ≤ 0). streamWidth > 0 adds a first column with
// the stream id, that wide (the watch view shows many streams). The
// columns of rank 0 are always kept, even when they need more than width.
func NewBreathTable(width, streamWidth int) *BreathTable {
	if width <= 0 {
		width = DefaultWidth
	}
	t := &BreathTable{width: width, streamW: max(streamWidth, 0)}
	used := 0
	if t.streamW > 0 {
		used = t.streamW
	}
	// A rank is added whole or not at all, so that R never shows without C.
	keep := make([]bool, len(breathColumns))
	for rank := 0; rank <= 3; rank++ {
		need := 0
		for _, c := range breathColumns {
			if c.rank == rank {
				need += c.width + 1
			}
		}
		if used == 0 {
			need-- // the first column has no separator
		}
		if rank > 0 && used+need > width {
			continue
		}
		for i, c := range breathColumns {
			if c.rank == rank {
				keep[i] = true
			}
		}
		used += need
	}
	for i, c := range breathColumns {
		if keep[i] {
			t.cols = append(t.cols, c)
		}
	}
	if room := width - used - 1; len(t.cols) == len(breathColumns) && room >= minFlagsWidth {
		t.flagsW = room
	}
	return t
}

// Header returns the two header lines: the names, then the units.
func (t *BreathTable) Header() []string {
	var names, units []string
	if t.streamW > 0 {
		names, units = append(names, pad("stream", t.streamW, true)), append(units, strings.Repeat(" ", t.streamW))
	}
	for _, c := range t.cols {
		names, units = append(names, pad(c.name, c.width, false)), append(units, pad(c.unit, c.width, false))
	}
	if t.flagsW > 0 {
		names, units = append(names, "flags"), append(units, "")
	}
	return []string{trimEnd(names), trimEnd(units)}
}

// Line returns the breath's line. The stream id and flags are sanitised.
func (t *BreathTable) Line(b *analyze.Breath) string {
	var parts []string
	if t.streamW > 0 {
		parts = append(parts, pad(Sanitize(b.Stream), t.streamW, true))
	}
	for _, c := range t.cols {
		parts = append(parts, pad(c.value(b), c.width, false))
	}
	if t.flagsW > 0 && len(b.Flags) > 0 {
		parts = append(parts, Fit(Sanitize(strings.Join(b.Flags, ",")), t.flagsW))
	}
	return trimEnd(parts)
}

// Placeholder returns a line for a stream with no breath yet (or no
// signal): the stream id and a note in place of the figures.
func (t *BreathTable) Placeholder(stream, note string) string {
	s := Sanitize(note)
	if t.streamW > 0 {
		s = pad(Sanitize(stream), t.streamW, true) + " " + s
	}
	return Fit(s, t.width)
}

// trimEnd joins the parts with one space and drops trailing spaces.
func trimEnd(parts []string) string { return strings.TrimRight(strings.Join(parts, " "), " ") }
