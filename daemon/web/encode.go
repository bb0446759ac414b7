package web

import (
	"math"
	"slices"
	"strconv"
	"time"

	"trapline/alerts"
)

// The page receives JSON written by hand here rather than through
// encoding/json: the frames carry long arrays of numbers, unknown values
// must come out as null, and the hub builds them ten times a second.
// Strings go through appendString, which writes valid JSON for any input
// (invalid UTF-8 becomes U+FFFD) and escapes the characters that matter
// in HTML, though the page never puts data into markup.

// appendString writes s as a JSON string.
func appendString(dst []byte, s string) []byte {
	const hex = "0123456789abcdef"
	dst = append(dst, '"')
	for _, r := range s {
		switch {
		case r == '"' || r == '\\':
			dst = append(dst, '\\', byte(r))
		case r < 0x20 || r == 0x2028 || r == 0x2029 || r == '<' || r == '>' || r == '&':
			dst = append(dst, '\\', 'u', hex[r>>12&0xf], hex[r>>8&0xf], hex[r>>4&0xf], hex[r&0xf])
		default:
			dst = append(dst, string(r)...)
		}
	}
	return append(dst, '"')
}

// appendNum writes v rounded to prec decimals (the shortest form, with an
// exponent where shorter, when prec < 0), or
// null when v is not finite.
func appendNum(dst []byte, v float64, prec int) []byte {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return append(dst, "null"...)
	}
	if prec < 0 {
		return strconv.AppendFloat(dst, v, 'g', -1, 64)
	}
	v = math.Round(v*math.Pow10(prec)) / math.Pow10(prec)
	if v == 0 {
		v = 0 // no "-0"
	}
	return strconv.AppendFloat(dst, v, 'f', -1, 64)
}

// appendKey writes ,"key": (or "key": first in an object when first).
func appendKey(dst []byte, key string, first bool) []byte {
	if !first {
		dst = append(dst, ',')
	}
	dst = append(dst, '"')
	dst = append(dst, key...)
	return append(dst, '"', ':')
}

// appendArray writes the values get picks from n items as a JSON array.
func appendArray(dst []byte, n int, prec int, get func(i int) float64) []byte {
	dst = append(dst, '[')
	for i := 0; i < n; i++ {
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = appendNum(dst, get(i), prec)
	}
	return append(dst, ']')
}

// appendEvent writes an alert event in the alert event contract.
func appendEvent(dst []byte, ev *alerts.Event) []byte {
	dst = appendKey(append(dst, '{'), "id", true)
	dst = appendString(dst, ev.ID)
	dst = appendString(appendKey(dst, "stream", false), ev.Stream)
	dst = appendString(appendKey(dst, "condition", false), ev.Condition)
	dst = appendString(appendKey(dst, "class", false), ev.Class)
	dst = appendString(appendKey(dst, "priority", false), string(ev.Priority))
	dst = appendString(appendKey(dst, "state", false), string(ev.State))
	dst = appendString(appendKey(dst, "time", false), ev.Time.UTC().Format(time.RFC3339Nano))
	dst = appendNum(appendKey(dst, "t_s", false), ev.TS, 3)
	dst = appendKey(dst, "breath_seq", false)
	if ev.BreathSeq != nil {
		dst = strconv.AppendInt(dst, int64(*ev.BreathSeq), 10)
	} else {
		dst = append(dst, "null"...)
	}
	dst = appendString(appendKey(dst, "message", false), ev.Message)
	dst = appendKey(dst, "evidence", false)
	dst = appendMap(dst, ev.Evidence)
	if ev.Supersedes != "" {
		dst = appendString(appendKey(dst, "supersedes", false), ev.Supersedes)
	}
	return append(dst, '}')
}

// appendMap writes a map of numbers with its keys in sorted order.
func appendMap(dst []byte, m map[string]float64) []byte {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	dst = append(dst, '{')
	for i, k := range keys {
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = appendString(dst, k)
		dst = append(dst, ':')
		dst = appendNum(dst, m[k], -1)
	}
	return append(dst, '}')
}
