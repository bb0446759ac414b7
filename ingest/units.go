package ingest

import (
	"fmt"
	"strings"
)

// Conversion factors to the internal units (s, cmH2O, L/s, L).
//
// The pressure factors follow from the definition 1 cmH2O = 98.0665 Pa
// (conventional standard gravity times 1 g/cm³ of water over 1 cm) and the
// SI pascal (BIPM, The International System of Units, 9th ed., 2019):
// 1 hPa = 1 mbar = 100/98.0665 = 1.019716 cmH2O and 1 kPa = 10.19716 cmH2O to
// seven significant digits. Dividing by 98.0665 keeps the conversion exact by
// definition instead of carrying the rounded seven-digit figure.
const (
	cmH2OPerHPa = 100 / 98.0665
	cmH2OPerKPa = 1000 / 98.0665
	// 1 mmHg = 133.322387415 Pa (13.5951 g/cm³ × 9.80665 m/s² × 1 mm).
	cmH2OPerMmHg = 133.322387415 / 98.0665
)

// unit converts a column value to internal units: v*mul, or v/div when div
// is not zero (a division by 60 or 1000 is correctly rounded, a
// multiplication by its inverse is not).
type unit struct {
	mul float64
	div float64
}

func (u unit) toInternal(v float64) float64 {
	if u.div != 0 {
		return v / u.div
	}
	return v * u.mul
}

func (u unit) fromInternal(v float64) float64 {
	if u.div != 0 {
		return v * u.div
	}
	return v / u.mul
}

// colKind is what a column of the text format carries.
type colKind uint8

const (
	colIgnore colKind = iota
	colTime
	colPressure
	colFlow
	colVolume
	colStream
)

func (k colKind) String() string {
	switch k {
	case colTime:
		return "time"
	case colPressure:
		return "pressure"
	case colFlow:
		return "flow"
	case colVolume:
		return "volume"
	case colStream:
		return "stream"
	default:
		return "ignored"
	}
}

// units lists, per column kind, the accepted unit names (compared without
// regard to case) and the default used when a header names no unit.
var units = map[colKind]struct {
	def   string
	table map[string]unit
}{
	colTime: {"s", map[string]unit{
		"s":  {mul: 1},
		"ms": {div: 1000},
	}},
	colPressure: {"cmH2O", map[string]unit{
		"cmh2o": {mul: 1},
		"hpa":   {mul: cmH2OPerHPa},
		"mbar":  {mul: cmH2OPerHPa},
		"kpa":   {mul: cmH2OPerKPa},
		"mmhg":  {mul: cmH2OPerMmHg},
	}},
	colFlow: {"L/min", map[string]unit{
		"l/min": {div: 60},
		"l/s":   {mul: 1},
		"ml/s":  {div: 1000},
	}},
	colVolume: {"mL", map[string]unit{
		"ml": {div: 1000},
		"l":  {mul: 1},
	}},
}

// unitNames is the list of accepted units of a kind, for error messages.
var unitNames = map[colKind]string{
	colTime:     "s, ms",
	colPressure: "cmH2O, hPa, mbar, kPa, mmHg",
	colFlow:     "L/min, L/s, mL/s",
	colVolume:   "mL, L",
}

// lookupUnit returns the conversion of unit name for a column kind; an empty
// name selects the kind's default unit.
func lookupUnit(k colKind, name string) (unit, error) {
	u, ok := units[k]
	if !ok {
		return unit{mul: 1}, nil
	}
	if name == "" {
		name = u.def
	}
	c, ok := u.table[strings.ToLower(name)]
	if !ok {
		return unit{}, fmt.Errorf("%s unit %q: want %s", k, name, unitNames[k])
	}
	return c, nil
}

func kindOf(name string) colKind {
	switch strings.ToLower(name) {
	case "time", "t":
		return colTime
	case "pressure", "paw", "p":
		return colPressure
	case "flow", "f":
		return colFlow
	case "volume", "v":
		return colVolume
	case "stream":
		return colStream
	default:
		return colIgnore
	}
}
